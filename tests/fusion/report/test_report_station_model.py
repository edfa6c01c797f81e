"""The report fed straight from a fitted :class:`fusion.model.station_model.StationModel`.

Contract with the learning side: ``station_table_``, ``pair_table_`` and ``epoch_table_`` are
accepted as they come (including object-dtype columns of an assembled table), and the planted
bias step shows up as a second epoch with its drift alarm.
"""

from __future__ import annotations

import warnings

import pandas as pd
import pytest

from fusion.model.station_model import STATION_TABLE_COLUMNS, StationModel
from fusion.network.network_magnitude import fuse_events
from fusion.report import ReportInputs, write_station_report
from fusion.report.inputs import STATION_COLUMNS


def test_station_table_columns_cover_the_report_inputs() -> None:
    assert set(STATION_COLUMNS) <= set(STATION_TABLE_COLUMNS)


def test_report_from_a_fitted_model(planted, tmp_path) -> None:  # type: ignore[no-untyped-def]
    obs = planted.net.observations
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # h = 8 (few false alarms, fusion.model.epochs); no bootstrap replicates: speed.
        model = StationModel(
            anchor="median", global_test_replicates=0, cusum_h=8.0, random_state=0
        ).fit(obs)
        fused = fuse_events(obs, model.parameters_)
    anchor = model.anchor_
    inputs = ReportInputs(
        model_meta={
            "version": "ML-fit",
            "magnitude_type": "ML",
            "anchor": {"kind": str(anchor.kind), "value": anchor.value, "se": anchor.se},
        },
        stations=model.station_table_,
        pairs=model.pair_table_,
        epochs=model.epoch_table_,
        events=fused.events,
        contributions=fused.contributions.assign(distance_km=obs.distance_km),
    )
    files = write_station_report(inputs, tmp_path, max_station_sections=2, n_event_pictures=0)
    table = pd.read_parquet(files.station_parquet).set_index("unit_id")
    assert len(table) == len(model.station_table_)
    # The +0.4 step of station 10 (mid-year) became a new epoch carrying its alarm.
    later = [u for u in table.index if u.startswith("ZZ.S010.@2025-0")]
    assert later, "the bias step was split into an epoch"
    assert table.loc[later, "n_drift_alarms"].sum() >= 1
    assert table.loc[later[0], "bias"] - table.loc["ZZ.S010.", "bias"] == pytest.approx(
        0.4, abs=0.08
    )
    assert "distance-trend" in table.loc["ZZ.S012.", "flags"]
    for k, l in (("ZZ.S000.", "ZZ.S001."), ("ZZ.S002.", "ZZ.S003."), ("ZZ.S004.", "ZZ.S005.")):
        assert table.loc[k, "partners"].startswith(l)
    html = files.html.read_text(encoding="utf-8")
    assert "median, value +0.000" in html
    assert html.count("<img ") == files.n_figures


def test_report_from_tables_stored_with_a_model_version(planted, tmp_path) -> None:  # type: ignore[no-untyped-def]
    """Tables as ``magfuse learn`` stores them (fusion.workflows.learning turns object columns into
    strings for Parquet, so flags may come back as text) and reads them back through
    :meth:`fusion.versions.model_registry.ModelRegistry.load_table`."""
    from fusion.versions.model_registry import ModelRegistry
    from fusion.workflows.learning import _parquet_safe

    obs = planted.net.observations
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = StationModel(
            anchor="median", global_test_replicates=0, cusum_h=8.0, random_state=0
        ).fit(obs)
        fused = fuse_events(obs, model.parameters_)
    pairs = model.pair_table_.astype({"flagged": object})  # as an assembled table may be
    reg = ModelRegistry(tmp_path / "store")
    version = reg.save(
        model.parameters_,
        {"anchor": {"kind": "median", "value": 0.0, "se": 0.05}},
        {
            "stations": model.station_table_,
            "pairs": _parquet_safe(pairs),
            "epochs": _parquet_safe(model.epoch_table_),
        },
    )
    loaded = {name: reg.load_table(version, name) for name in ("stations", "pairs", "epochs")}
    # Stored tables keep their bool type
    # (fusion.workflows.learning._parquet_safe infers object columns).
    assert loaded["pairs"]["flagged"].dtype == bool
    inputs = ReportInputs(
        model_meta=dict(version.meta),
        stations=loaded["stations"],
        pairs=loaded["pairs"],
        epochs=loaded["epochs"],
        events=fused.events,
        contributions=fused.contributions,
    )
    files = write_station_report(inputs, tmp_path / "out", max_station_sections=1)
    table = pd.read_parquet(files.station_parquet).set_index("unit_id")
    flagged_units = set(pairs.loc[pairs["flagged"].astype(bool), "station_k"])
    has_partner = set(table.index[table["partners"] != ""])
    assert flagged_units <= has_partner
    assert len(has_partner) == 2 * len(flagged_units)  # "False" text never reads as a flag
    assert table["n_drift_alarms"].sum() == len(model.epoch_table_)
    assert version.version_id in files.html.read_text(encoding="utf-8")
