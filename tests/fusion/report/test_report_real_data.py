"""The report on real open data: UUSS Yellowstone station ML (Holt, Pechmann & Koper 2022).

With the network's own station corrections as the model (b̂ = −Corr, one unit per correction
epoch) and equal σ, the fused magnitude of an event is the plain mean of the network's
corrected station ML (checked in tests/fusion/network/test_network_magnitude.py). The report's
per-unit residual figures must then equal pandas group-bys of SML minus that mean.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from fusion.model.parameters import StationParameters
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import fuse_events
from fusion.observations import ObservationSet
from fusion.report import report_inputs_from_parameters, write_station_report
from tests.datasets import YELLOWSTONE

DATA = YELLOWSTONE
NAT = np.datetime64("NaT", "us")


@pytest.fixture(scope="module")
def uuss() -> tuple[pd.DataFrame, object]:
    d = pd.read_csv(DATA / "station_ml_geobalanced.csv")
    d = d[d["Corr"].notna()].copy()  # 30 rows carry no correction: raw station ML unknown
    d["sid"] = d["Net"] + "." + d["Sta"] + "."
    d["t"] = pd.to_datetime(d["Date"] + "T" + d["Time"]).astype("datetime64[us]")
    # One unit per (station, Corr) epoch, from the first use of that Corr to the next one's;
    # rows whose Corr is not their epoch's (a handful for YUF) are dropped.
    ep = d.groupby(["sid", "Corr"])["t"].min().reset_index().sort_values(["sid", "t"])
    lab = pd.merge_asof(
        d.sort_values("t"), ep.rename(columns={"Corr": "ec"}).sort_values("t"), on="t", by="sid"
    )
    d = lab[lab["Corr"] == lab["ec"]].reset_index(drop=True)
    nxt = ep.groupby("sid")["t"].shift(-1)
    first = ep.groupby("sid").cumcount() == 0
    K = len(ep)
    unit_ids = np.where(first, ep["sid"], ep["sid"] + "@" + ep["t"].dt.strftime("%Y-%m-%d")).astype(
        object
    )
    params = StationParameters(
        magnitude_type="ML",
        unit_ids=unit_ids,
        station_ids=ep["sid"].to_numpy(dtype=object),
        epoch_start=np.where(first, NAT, ep["t"].to_numpy().astype("datetime64[us]")),
        epoch_end=np.where(nxt.isna(), NAT, nxt.to_numpy().astype("datetime64[us]")),
        bias=-ep["Corr"].to_numpy(),
        bias_var=np.zeros(K),
        sigma2=np.full(K, 0.21**2),  # Hutton & Boore (1987) residual SD; any equal value works
        prior_dominated=np.zeros(K, dtype=bool),
        pairs=PairCovariance.empty(K),
        tau_b2=0.04,
        s0_2=0.0441,
    )
    obs = ObservationSet.from_rows(
        magnitude_type="ML",
        event_id=d["Evid"].astype(str),
        station_id=d["sid"],
        magnitude=(d["SML"] - d["Corr"]).to_numpy(),
        origin_time=d["t"].to_numpy(),
        distance_km=d["Repi"].to_numpy(),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fused = fuse_events(obs, params, robust_min_stations=1000)
    coords = d.groupby("sid")[["SLat", "SLon"]].first().reset_index()
    coords.columns = ["station_id", "latitude", "longitude"]
    inputs = report_inputs_from_parameters(
        params,
        fused,
        model_meta={"version": "UUSS network corrections (Holt et al. 2022 data)"},
        coordinates=coords,
        distance_km=obs.distance_km,
    )
    return d, inputs


def test_residual_figures_equal_pandas_groupbys(uuss, tmp_path) -> None:  # type: ignore[no-untyped-def]
    d, inputs = uuss
    files = write_station_report(
        inputs, tmp_path, max_station_sections=2, top_by_weight=1, n_event_pictures=1
    )
    table = pd.read_parquet(files.station_parquet).set_index("unit_id")
    # Independent computation: SML minus the event's mean SML, events with >= 2 stations.
    ev = d.groupby("Evid")["SML"]
    d = d.assign(n=ev.transform("size"), r=d["SML"] - ev.transform("mean"))
    u = inputs.contributions[["event_id", "unit_id"]].astype(str)
    # The contribution rows follow the observation set; map each UUSS row to its unit.
    key = d["Evid"].astype(str) + "|" + d["sid"]
    unit_of = (
        pd.Series(
            u["unit_id"].to_numpy(),
            index=u["event_id"] + "|" + inputs.contributions["station_id"].astype(str),
        )
        .groupby(level=0)
        .first()
    )
    d = d.assign(unit=unit_of.reindex(key).to_numpy())
    two = d[d["n"] >= 2]
    want_mean = two.groupby("unit")["r"].mean()
    want_n = d.groupby("unit").size()
    np.testing.assert_allclose(
        table.loc[want_mean.index, "residual_mean"], want_mean.to_numpy(), atol=1e-9
    )
    np.testing.assert_array_equal(table.loc[want_n.index, "n_readings"], want_n.to_numpy())
    assert table["weight_share"].sum() == pytest.approx(1.0, abs=1e-9)
    html = files.html.read_text(encoding="utf-8")
    assert html.count("<img ") == files.n_figures
    assert files.n_units == 25
