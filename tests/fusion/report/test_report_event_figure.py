"""The event picture on docs/worked-examples.md E1, plus colours and axis labels."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_rgb
from PIL import Image

from fusion.advisory import ADVISORY
from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import NetworkEstimate, fuse_events
from fusion.observations import ObservationSet
from fusion.report import render_event_figure
from fusion.report.drawing import new_figure
from fusion.report.event_figure import MAX_AREA, draw_event, event_picture
from fusion.report.figures import draw_station, station_figure
from fusion.report.palette import OKABE_ITO, ROLE
from stations.errors import ConfigError

# docs/worked-examples.md E1 (exact worked example, recomputed; tolerance 1e-6): GLS of
# bias-corrected readings (3.9, 4.3, 4.0) with σ = (0.1, 0.2, 0.3).
E1_READINGS = (3.9, 4.3, 4.0)
E1_SIGMA = (0.1, 0.2, 0.3)
E1_WEIGHTS = (0.734694, 0.183673, 0.081633)
E1_MAGNITUDE = 3.981633
E1_SE = 0.0857143
STATIONS = ("XX.A.", "XX.B.", "XX.C.")


@pytest.fixture(scope="module")
def e1() -> NetworkEstimate:
    K = 3
    nat = np.datetime64("NaT", "us")
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=np.array(STATIONS, dtype=object),
        station_ids=np.array(STATIONS, dtype=object),
        epoch_start=np.full(K, nat),
        epoch_end=np.full(K, nat),
        bias=np.zeros(K),
        bias_var=np.zeros(K),
        sigma2=np.asarray(E1_SIGMA) ** 2,
        prior_dominated=np.zeros(K, dtype=bool),
        pairs=PairCovariance.empty(K),
        tau_b2=0.04,
        s0_2=0.09,
    )
    obs = ObservationSet.from_rows(
        magnitude_type="ML",
        event_id=["e1"] * 3,
        station_id=list(STATIONS),
        magnitude=list(E1_READINGS),
    )
    # Robust weights off (they need >= 4 stations here): E1 is the plain GLS example.
    return fuse_events(obs, params, robust_min_stations=4).event("e1")


def test_e1_weights_and_station_intervals(e1: NetworkEstimate) -> None:
    """Weights are E1's; without a station table the interval SD is SE/sqrt(w), which for
    the diagonal GLS is exactly σ_i (E1: SE 0.0857143 and the weights give 0.1, 0.2, 0.3)."""
    pic = event_picture(e1)
    np.testing.assert_allclose(pic.weight, E1_WEIGHTS, atol=1e-6)
    assert pic.magnitude == pytest.approx(E1_MAGNITUDE, abs=1e-6)
    assert pic.se == pytest.approx(E1_SE, abs=1e-6)
    np.testing.assert_allclose(pic.sd, E1_SIGMA, rtol=1e-9)
    table = pd.DataFrame(
        {"unit_id": STATIONS, "station_id": STATIONS, "sigma": E1_SIGMA, "bias_se": 0.0}
    )
    np.testing.assert_allclose(event_picture(e1, stations=table).sd, E1_SIGMA, rtol=1e-12)
    assert pic.plain_mean == pytest.approx(np.mean(E1_READINGS))


def test_marker_area_is_proportional_to_weight(e1: NetworkEstimate) -> None:
    """The drawn collection's sizes (points²) are MAX_AREA·w/max w for E1's weights; the
    network line sits at M̂ and the plain-mean line at the mean of the raw readings."""
    pic = event_picture(e1, distance_km={"XX.A.": 12.0, "XX.B.": 40.0, "XX.C.": 95.0})
    with new_figure(10.5, 5.4) as fig:
        draw_event(fig, pic)
        ax = fig.axes[0]
        (corrected,) = [c for c in ax.collections if c.get_gid() == "corrected"]
        w = np.asarray(E1_WEIGHTS)
        np.testing.assert_allclose(corrected.get_sizes(), MAX_AREA * w / w.max(), rtol=1e-5)
        np.testing.assert_allclose(corrected.get_offsets()[:, 0], [12.0, 40.0, 95.0])
        levels = sorted(
            float(line.get_ydata()[0])
            for line in ax.get_lines()
            if len(line.get_ydata()) == 2 and line.get_ydata()[0] == line.get_ydata()[1]
        )
        assert levels == pytest.approx(sorted([E1_MAGNITUDE, np.mean(E1_READINGS)]), abs=1e-6)
        assert ax.get_xlabel() == "epicentral distance (km)"


def test_png_html_and_file_output(e1: NetworkEstimate, tmp_path) -> None:  # type: ignore[no-untyped-def]
    coords = pd.DataFrame(
        {"station_id": STATIONS, "latitude": [-46.0, -46.3, -45.8], "longitude": [-20, -19.5, -19]}
    )
    png = render_event_figure(e1, coordinates=coords, epicenter=(-19.6, -46.0))
    im = Image.open(io.BytesIO(png))
    assert im.format == "PNG" and im.size[0] > im.size[1]
    out = tmp_path / "e1.html"
    page = render_event_figure(e1, fmt="html", out=out).decode("utf-8")
    assert out.read_text(encoding="utf-8") == page
    assert page.count("<img ") == 1
    assert ADVISORY in page
    assert "3.98" in page and "XX.B." in page
    with pytest.raises(ConfigError, match=r"'fmt'.*'svg'"):
        render_event_figure(e1, fmt="svg")  # type: ignore[arg-type]


def test_every_axis_names_its_unit(e1: NetworkEstimate, planted) -> None:  # type: ignore[no-untyped-def]
    """Each data axis of the event picture and of a station section carries a label with a
    unit in parentheses (km, UTC, magnitude units) or a count ('readings per bin')."""
    coords = pd.DataFrame(
        {"station_id": STATIONS, "latitude": [-46.0, -46.3, -45.8], "longitude": [-20, -19.5, -19]}
    )
    pic = event_picture(e1, coordinates=coords, distance_km={"XX.A.": 5.0})
    with new_figure(14.0, 5.4) as fig:
        draw_event(fig, pic)
        data_axes = [ax for ax in fig.axes if ax.axison]
        assert len(data_axes) == 2
        for ax in data_axes:
            for label in (ax.get_xlabel(), ax.get_ylabel()):
                assert "(" in label and label.endswith(")"), label
    # A station section (the planted distance-trend station).
    from fusion.report.joined import join_rows
    from fusion.report.station_table import station_reliability_table
    from fusion.report.writer import _station_panel

    inputs = planted.inputs.validated()
    jr = join_rows(inputs)
    st = station_reliability_table(inputs, joined=jr)
    no_alarm = np.array([], dtype="datetime64[us]")
    data, _ = _station_panel("ZZ.S012.", np.array([12]), st, jr, no_alarm, 0.95, 0.3, 20)
    with new_figure(10.0, 6.8) as fig:
        draw_station(fig, data)
        assert len(fig.axes) == 4
        for ax in fig.axes:
            for label in (ax.get_xlabel(), ax.get_ylabel()):
                assert label.endswith(")") or label == "readings per bin", label
    assert Image.open(io.BytesIO(station_figure(data))).format == "PNG"


def test_palette_is_okabe_ito() -> None:
    """Okabe & Ito (2008) colours as RGB 0-255 (from memory; the same triples are printed by
    Wong 2011, Nature Methods 8:441): every role colour of the figures is one of them or the
    neutral grey of raw readings."""
    published = {
        "black": (0, 0, 0),
        "orange": (230, 159, 0),
        "sky_blue": (86, 180, 233),
        "bluish_green": (0, 158, 115),
        "yellow": (240, 228, 66),
        "blue": (0, 114, 178),
        "vermillion": (213, 94, 0),
        "reddish_purple": (204, 121, 167),
    }
    for name, rgb in published.items():
        assert tuple(round(255 * c) for c in to_rgb(OKABE_ITO[name])) == rgb
    allowed = set(OKABE_ITO.values()) | {"#7F7F7F"}
    assert set(ROLE.values()) <= allowed


def test_write_event_figure_from_an_explanation(e1: NetworkEstimate, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """``magfuse event --png/--html`` path: distances and epicentre come from the store
    readings of :class:`fusion.workflows.event_view.EventExplanation`, the version is named."""
    from fusion.report import write_event_figure
    from fusion.workflows.event_view import EventExplanation

    readings = pd.DataFrame(
        {
            "station_id": list(STATIONS),
            "distance_km": [12.0, 40.0, np.nan],
            "event_latitude": -46.1,
            "event_longitude": -19.7,
        }
    )
    ex = EventExplanation(e1, {}, "ML-20250101T000000Z-abcdef12", None, readings)  # type: ignore[arg-type]
    png = write_event_figure(ex, tmp_path / "e.png", fmt="png")
    assert Image.open(png).format == "PNG"
    page = write_event_figure(ex, tmp_path / "e.html", fmt="html").read_text(encoding="utf-8")
    assert "ML-20250101T000000Z-abcdef12" in page
    assert ">12.0<" in page and ">40.0<" in page  # distances reached the station table
    with pytest.raises(ConfigError, match="'fmt'"):
        write_event_figure(ex, tmp_path / "e.svg", fmt="svg")
