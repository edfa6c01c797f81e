"""The HTML report: self-contained, every figure a decodable PNG, links resolve, sections
chosen by the documented rule; rendered in headless Chromium when one is installed."""

from __future__ import annotations

import dataclasses
import io
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from fusion.advisory import ADVISORY
from fusion.report import ReportFiles, station_reliability_table, write_station_report
from fusion.report.drawing import png_data_uri
from fusion.report.sections import select_section_stations
from stations.errors import ConfigError

IMG = re.compile(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"')
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def report(planted, tmp_path_factory) -> ReportFiles:  # type: ignore[no-untyped-def]
    out = tmp_path_factory.mktemp("report")
    return write_station_report(
        planted.inputs, out, max_station_sections=5, top_by_weight=2, n_event_pictures=2
    )


@pytest.fixture(scope="module")
def html(report: ReportFiles) -> str:
    return report.html.read_text(encoding="utf-8")


def test_files_and_figure_count(report: ReportFiles, html: str) -> None:
    assert report.html.name == "station_report_ML.html"
    assert report.station_csv.exists() and report.station_parquet.exists()
    images = IMG.findall(html)
    assert len(images) == report.n_figures == html.count("<img ")
    # 2 network figures + 2 event pictures + 5 station sections + 1 pair map.
    assert report.n_figures == 10
    assert len(report.section_stations) == 5


def test_every_image_is_a_non_blank_png(html: str) -> None:
    """Pillow (an independent decoder) opens each inline PNG; each has real content (grey
    level SD above 10 on 0-255, a blank or single-colour image has 0)."""
    import base64

    for data in IMG.findall(html):
        im = Image.open(io.BytesIO(base64.b64decode(data)))
        assert im.format == "PNG"
        assert im.size[0] >= 400 and im.size[1] >= 200
        assert float(np.asarray(im.convert("L"), dtype=float).std()) > 10.0


def test_page_is_self_contained_and_cautious(html: str) -> None:
    """Nothing is fetched: no script, no external src/href, no @import or url(http)."""
    assert "<script" not in html.lower()
    assert not re.search(r'(src|href)="(?!data:|#)', html)
    assert "http://" not in html and "https://" not in html
    assert "@import" not in html
    assert html.count(ADVISORY) >= 2
    assert "ML-20250101T000000Z-test0000" in html
    assert "reference_set, value +0.000 (SE 0.012)" in html
    assert "2025-01-01 00:00 UTC to 2026-01-01 00:00 UTC" in html


def test_internal_links_resolve(html: str) -> None:
    targets = set(re.findall(r'id="([^"]+)"', html))
    links = re.findall(r'href="#([^"]+)"', html)
    assert links, "the report links its sections and events"
    assert set(links) <= targets
    # Outlier readings and the most affected events link to event rows.
    assert any(link.startswith("ev") for link in links)


def test_sections_follow_the_rule(report: ReportFiles, planted) -> None:  # type: ignore[no-untyped-def]
    table = station_reliability_table(planted.inputs.validated())
    heavy = table.sort_values("weight_share", ascending=False)["station_id"].drop_duplicates()[:2]
    assert set(heavy) <= set(report.section_stations)
    # The stations with the strongest planted evidence come first.
    assert report.section_stations[0] in {"ZZ.S013.", "ZZ.S012.", "ZZ.S010."}


def test_selection_rule_on_a_crafted_table() -> None:
    table = pd.DataFrame(
        {
            "station_id": ["A", "B", "C", "D", "E", "E"],
            "weight_share": [0.30, 0.25, 0.05, 0.04, 0.01, 0.02],
            "flags": [
                "",
                "",
                "distance-trend",
                "distance-trend;many-outliers",
                "prior-dominated",
                "magnitude-trend",
            ],
            "distance_t": [0.0, 0.0, 3.5, 9.0, np.nan, 0.0],
            "magnitude_t": [0.0, 0.0, 0.0, 0.0, np.nan, -4.0],
            "residual_mean_t": [0.0] * 6,
        }
    )
    # D has two flags, then E (|t| 4) before C (|t| 3.5); A and B are the heaviest.
    assert select_section_stations(table, max_sections=5, top_by_weight=2) == [
        "D",
        "E",
        "C",
        "A",
        "B",
    ]
    assert select_section_stations(table, max_sections=3, top_by_weight=2) == ["D", "A", "B"]
    assert select_section_stations(table, max_sections=2, top_by_weight=5) == ["A", "B"]
    assert select_section_stations(table, max_sections=0) == []
    with pytest.raises(ConfigError, match="'max_sections'"):
        select_section_stations(table, max_sections=-1)


def test_ids_are_escaped(planted, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """An id carrying markup is shown as text, never interpreted."""
    evil = '<b onmouseover="x">'
    ev = planted.inputs.events.copy()
    ev.loc[ev.index[0], "flags"] = evil
    inputs = dataclasses.replace(planted.inputs, events=ev)
    out = write_station_report(
        inputs, tmp_path, max_station_sections=0, n_event_pictures=0, n_affected_events=2000
    )
    text = out.html.read_text(encoding="utf-8")
    assert evil not in text
    assert "&lt;b onmouseover=&quot;x&quot;&gt;" in text


def test_bad_parameters(planted, tmp_path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(ConfigError, match=r"'max_station_sections'.*Got -1"):
        write_station_report(planted.inputs, tmp_path, max_station_sections=-1)
    with pytest.raises(ConfigError, match="'min_trend_rows'"):
        write_station_report(planted.inputs, tmp_path, min_trend_rows=2)
    with pytest.raises(ConfigError, match="'since'"):
        write_station_report(planted.inputs, tmp_path, since="yesterday-ish")


def test_no_coordinates_pairs_or_events(planted, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A model alone (no events in the window, no coordinates) still gives a valid page."""
    inputs = dataclasses.replace(planted.inputs, coordinates=None)
    out = write_station_report(inputs, tmp_path, since="2030-01-01", max_station_sections=1)
    text = out.html.read_text(encoding="utf-8")
    assert out.n_events == 0
    assert "No station coordinates given: no map." in text
    assert text.count("<img ") == out.n_figures == 2  # σ ranking + one station section


def test_png_data_uri_is_rfc2397() -> None:
    assert png_data_uri(b"\x89PNG") == "data:image/png;base64,iVBORw=="


@pytest.mark.browser
@pytest.mark.skipif(CHROMIUM is None, reason="no headless Chromium installed (/usr/bin/chromium)")
def test_renders_in_headless_chromium(report: ReportFiles, tmp_path: Path) -> None:
    """A real browser loads the file offline and shows its figures: the screenshot is not
    blank (grey-level SD > 20) and the rendered DOM holds as many <img> as figures drawn."""
    assert CHROMIUM is not None
    flags = [
        CHROMIUM,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
    ]
    url = report.html.resolve().as_uri()
    shot = tmp_path / "shot.png"
    subprocess.run(
        [*flags, f"--screenshot={shot}", "--window-size=1200,3000", url],
        check=True,
        capture_output=True,
        timeout=120,
    )
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape == (3000, 1200)
    assert pixels.std() > 20.0
    dom = subprocess.run(
        [*flags, "--dump-dom", url], check=True, capture_output=True, timeout=120, text=True
    ).stdout
    assert dom.count("<img ") == report.n_figures
    assert "Network summary" in dom


def test_matplotlib_is_imported_only_when_drawing() -> None:
    """The command line imports fusion.report for every command; matplotlib loads lazily."""
    import sys

    code = "import sys, fusion.report; print('matplotlib' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code], check=True, capture_output=True, text=True, timeout=60
    )
    assert out.stdout.strip() == "False"
