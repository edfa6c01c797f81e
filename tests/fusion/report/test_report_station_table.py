"""The station reliability table: numbers against pandas/statsmodels/scipy, planted problems
flagged, files through the declared schema, bad input refused with a one-line message."""

from __future__ import annotations

import dataclasses
import re

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm
from scipy import stats

from fusion.model.diagnostics import sigma_interval
from fusion.report import STATION_REPORT_SCHEMA, ReportInputs, station_reliability_table
from fusion.report.joined import apply_window
from fusion.report.station_table import write_station_table
from stations.errors import ConfigError, DomainError, SchemaError
from stations.schema import check_schema

DIST_TREND_STATION = "ZZ.S012."
SATURATION_STATION = "ZZ.S013."
STEP_STATION = "ZZ.S010."


@pytest.fixture(scope="module")
def table(planted) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    return station_reliability_table(planted.inputs.validated())


def _analysable(planted) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    """Contribution rows of events with >= 2 stations, joined to their event, in pandas."""
    co = planted.inputs.contributions.copy()
    ev = planted.inputs.events.set_index("event_id")
    co["event_id"] = co["event_id"].astype(str)
    co["station_id"] = co["station_id"].astype(str)
    co["n_ev"] = ev["n_stations"].reindex(co["event_id"]).to_numpy()
    co["M"] = ev["magnitude"].reindex(co["event_id"]).to_numpy()
    return co[co["detected"] & co["residual"].notna() & (co["n_ev"] >= 2)]


# -- numbers against independent computations ---------------------------------------------------


def test_counts_shares_and_outlier_rate_against_pandas_groupby(planted, table) -> None:  # type: ignore[no-untyped-def]
    co = planted.inputs.contributions.assign(station_id=lambda f: f["station_id"].astype(str))
    det = co[co["detected"]]
    g = det.groupby("station_id")
    np.testing.assert_array_equal(
        table["n_readings"], g.size().reindex(table["station_id"]).to_numpy()
    )
    n_events = int(planted.inputs.events["magnitude"].notna().sum())
    share = co.groupby("station_id")["weight"].sum().reindex(table["station_id"]) / n_events
    np.testing.assert_allclose(table["weight_share"], share.to_numpy(), rtol=1e-12)
    # Every event's weights sum to 1 and the model knows every station: shares sum to 1.
    assert table["weight_share"].sum() == pytest.approx(1.0, abs=1e-9)
    rate = g["robust_weight"].apply(lambda s: float((s < 0.3).mean()))
    np.testing.assert_allclose(table["outlier_rate"], rate.reindex(table["station_id"]), rtol=1e-12)


def test_residual_offset_and_trends_equal_statsmodels(planted, table) -> None:  # type: ignore[no-untyped-def]
    """statsmodels WLS with the robust weights: intercept-only for the mean residual, and the
    slopes on log10 distance and on network magnitude."""
    a = _analysable(planted)
    for sid in (DIST_TREND_STATION, SATURATION_STATION, "ZZ.S020."):
        r = a[a["station_id"] == sid]
        row = table.set_index("station_id").loc[sid]
        w = r["robust_weight"].to_numpy()
        mean_fit = sm.WLS(r["residual"].to_numpy(), np.ones(len(r)), weights=w).fit()
        assert row["residual_mean"] == pytest.approx(mean_fit.params[0], rel=1e-9, abs=1e-12)
        assert row["residual_mean_t"] == pytest.approx(mean_fit.tvalues[0], rel=1e-9)
        for col, x in (
            ("distance", np.log10(r["distance_km"].to_numpy())),
            ("magnitude", r["M"].to_numpy()),
        ):
            fit = sm.WLS(r["residual"].to_numpy(), sm.add_constant(x), weights=w).fit()
            assert row[f"{col}_slope"] == pytest.approx(fit.params[1], rel=1e-9, abs=1e-12)
            assert row[f"{col}_slope_se"] == pytest.approx(fit.bse[1], rel=1e-9)
            assert row[f"{col}_t"] == pytest.approx(fit.tvalues[1], rel=1e-9)
            assert row[f"{col}_n"] == len(r)


def test_bias_interval_is_normal_and_sigma_interval_is_chi_square(table, planted) -> None:  # type: ignore[no-untyped-def]
    st = planted.inputs.stations
    z = 1.959964  # Φ⁻¹(0.975), standard normal table (verified with scipy.stats.norm.ppf)
    assert stats.norm.ppf(0.975) == pytest.approx(z, abs=1e-6)
    np.testing.assert_allclose(table["bias_ci_high"] - table["bias"], z * st["bias_se"], rtol=1e-6)
    np.testing.assert_allclose(table["bias"] - table["bias_ci_low"], z * st["bias_se"], rtol=1e-6)
    d = 150.0  # the fixture's dof
    lo = st["sigma"] * np.sqrt(d / stats.chi2.ppf(0.975, d))
    hi = st["sigma"] * np.sqrt(d / stats.chi2.ppf(0.025, d))
    np.testing.assert_allclose(table["sigma_ci_low"], lo, rtol=1e-12)
    np.testing.assert_allclose(table["sigma_ci_high"], hi, rtol=1e-12)
    assert list(table["sigma_rank"]) == list(st["sigma"].rank(method="min").astype(int))


def test_sigma_interval_covers_at_its_level() -> None:
    """Monte Carlo check of the chi-square interval (the textbook interval for a normal SD):
    20,000 sample SDs with 12 degrees of freedom, coverage within 4 binomial SDs of 0.95."""
    rng = np.random.default_rng(8)
    sigma, d, n = 0.25, 12, 20_000
    s = sigma * np.sqrt(rng.chisquare(d, size=n) / d)
    lo, hi = sigma_interval(s, np.full(n, float(d)), 0.95)
    cover = float(np.mean((lo <= sigma) & (sigma <= hi)))
    assert abs(cover - 0.95) < 4.0 * np.sqrt(0.95 * 0.05 / n)
    lo, hi = sigma_interval(np.array([0.2, 0.2]), np.array([np.nan, 0.0]), 0.95)
    assert np.isnan(lo).all() and np.isnan(hi).all()


# -- planted problems ---------------------------------------------------------------------------


def _flags(table: pd.DataFrame, sid: str) -> set[str]:
    return set(str(table.set_index("station_id").loc[sid, "flags"]).split(";")) - {""}


def test_planted_problems_are_flagged(table) -> None:  # type: ignore[no-untyped-def]
    """The distance trend, the saturation and the bias step planted in the fixture each
    raise their flag; the true correlated pairs are listed as partners."""
    assert "distance-trend" in _flags(table, DIST_TREND_STATION)
    assert table.set_index("station_id").loc[DIST_TREND_STATION, "distance_slope"] > 0.2
    assert "magnitude-trend" in _flags(table, SATURATION_STATION)
    assert table.set_index("station_id").loc[SATURATION_STATION, "magnitude_slope"] < -0.1
    step = _flags(table, STEP_STATION)
    assert {"residual-offset", "drift-alarm"} <= step
    partners = table.set_index("station_id")["partners"]
    for k, l in (("ZZ.S000.", "ZZ.S001."), ("ZZ.S002.", "ZZ.S003."), ("ZZ.S004.", "ZZ.S005.")):
        assert partners[k].startswith(l) and partners[l].startswith(k)
        assert "correlated-pair" in _flags(table, k)


def test_clean_stations_are_rarely_flagged(table) -> None:  # type: ignore[no-untyped-def]
    """Stations without a planted problem and outside the true pairs: no trend flag at all
    (expected by chance: 2·18·0.0027 ≈ 0.1)."""
    clean = table[
        ~table["station_id"].isin([f"ZZ.S{i:03d}." for i in (0, 1, 2, 3, 4, 5, 10, 12, 13)])
    ]
    flags = ";".join(clean["flags"])
    assert "distance-trend" not in flags
    assert "magnitude-trend" not in flags


def test_drift_alarm_goes_to_the_epoch_holding_the_alarm(planted) -> None:  # type: ignore[no-untyped-def]
    """With the model split at mid-year, an alarm in the second half lands on the second
    unit only."""
    st = planted.inputs.stations
    sid = STEP_STATION
    split = pd.Timestamp("2025-06-01", tz="UTC")
    first = st[st["station_id"] == sid].assign(epoch_end=split)
    second = first.assign(unit_id=f"{sid}@2025-06-01", epoch_start=split, epoch_end=pd.NaT)
    stations = pd.concat([st[st["station_id"] != sid], first, second], ignore_index=True)
    alarms = planted.inputs.epochs
    inputs = dataclasses.replace(planted.inputs, stations=stations)
    tab = station_reliability_table(inputs.validated()).set_index("unit_id")
    n_late = int(
        (pd.to_datetime(alarms["alarm_time"], utc=True)[alarms["station_id"] == sid] >= split).sum()
    )
    assert n_late >= 1
    assert tab.loc[f"{sid}@2025-06-01", "n_drift_alarms"] == n_late
    assert tab.loc[sid, "n_drift_alarms"] == (alarms["station_id"] == sid).sum() - n_late


def test_since_keeps_later_events_only(planted) -> None:  # type: ignore[no-untyped-def]
    since = "2025-10-01"
    win = apply_window(planted.inputs, since)
    t = pd.to_datetime(win.events["origin_time"], utc=True)
    assert (t >= pd.Timestamp(since, tz="UTC")).all()
    n_all = (
        pd.to_datetime(planted.inputs.events["origin_time"], utc=True)
        >= pd.Timestamp(since, tz="UTC")
    ).sum()
    assert len(win.events) == n_all
    tab = station_reliability_table(win)
    co = win.contributions
    counts = co[co["detected"]].groupby(co["station_id"].astype(str)).size()
    np.testing.assert_array_equal(tab["n_readings"], counts.reindex(tab["station_id"]).fillna(0))
    with pytest.raises(ConfigError, match="'since'"):
        apply_window(planted.inputs, "not a date")


# -- files --------------------------------------------------------------------------------------


def test_files_follow_the_declared_schema_and_round_trip(table, tmp_path) -> None:  # type: ignore[no-untyped-def]
    csv, parquet = tmp_path / "s.csv", tmp_path / "s.parquet"
    write_station_table(table, csv, parquet, metadata={"magfuse.model_version": "v1"})
    schema = pq.read_schema(parquet)
    check_schema(schema, STATION_REPORT_SCHEMA, where=str(parquet))
    assert schema.names == STATION_REPORT_SCHEMA.names
    meta = schema.metadata
    assert meta[b"magfuse.schema"] == b"station_report"
    assert meta[b"magfuse.model_version"] == b"v1"
    assert schema.field("bias").metadata[b"unit"] == b"magnitude units"
    back = pq.read_table(parquet).to_pandas()
    np.testing.assert_allclose(back["distance_t"], table["distance_t"], equal_nan=True)
    assert list(back["flags"]) == list(table["flags"])
    text = pd.read_csv(csv, keep_default_na=False, na_values=[""])
    np.testing.assert_allclose(text["sigma"], table["sigma"], rtol=1e-12)
    assert list(text.columns) == STATION_REPORT_SCHEMA.names


def test_report_table_files_carry_the_advisory_a_sidecar_and_lowercase_booleans(
    table, tmp_path
) -> None:  # type: ignore[no-untyped-def]
    """Like every export: README sidecar with the advisory and every column, Parquet metadata
    with the advisory, CSV booleans written true/false."""
    from fusion.advisory import ADVISORY
    from fusion.export.sidecar import readme_path

    csv, parquet = tmp_path / "s.csv", tmp_path / "s.parquet"
    write_station_table(table, csv, parquet, metadata={"magfuse.model_version": "v1"})
    assert pq.read_schema(parquet).metadata[b"magfuse.advisory"].decode() == ADVISORY
    for path in (csv, parquet):
        readme = readme_path(path).read_text(encoding="utf-8")
        assert ADVISORY in readme and "v1" in readme
        for name in STATION_REPORT_SCHEMA.names:
            assert re.search(rf"^{name}\s", readme, re.M), name
    raw = pd.read_csv(csv, dtype=str, keep_default_na=False)
    assert set(raw["prior_dominated"]) | set(raw["uncalibrated"]) <= {"true", "false"}
    assert "False" not in csv.read_text(encoding="utf-8").replace('"', "").split(",")


# -- bad input ----------------------------------------------------------------------------------


def test_missing_column_names_table_and_column(planted) -> None:  # type: ignore[no-untyped-def]
    bad = dataclasses.replace(
        planted.inputs, stations=planted.inputs.stations.drop(columns="sigma")
    )
    with pytest.raises(SchemaError, match=r"ReportInputs\.stations: column 'sigma' is missing"):
        bad.validated()
    ev = planted.inputs.events.astype({"origin_time": object})
    ev.loc[5, "origin_time"] = "last Tuesday"
    bad = dataclasses.replace(planted.inputs, events=ev)
    with pytest.raises(SchemaError, match=r"'origin_time', row 5: 'last Tuesday' is not a time"):
        bad.validated()
    bad = dataclasses.replace(planted.inputs, events=planted.inputs.events.assign(origin_time=1.0))
    with pytest.raises(SchemaError, match=r"'origin_time' holds numbers"):
        bad.validated()
    co = planted.inputs.contributions.astype({"weight": object})
    co.loc[7, "weight"] = "heavy"
    with pytest.raises(SchemaError, match=r"'weight', row 7: 'heavy' is not a number"):
        dataclasses.replace(planted.inputs, contributions=co).validated()


@pytest.mark.parametrize(
    ("column", "value", "message"),
    [
        ("sigma", 0.0, r"row 3 \(unit_id 'ZZ.S003.'\): sigma must be > 0"),
        ("sigma", np.nan, "sigma must be > 0"),
        ("bias_se", -0.1, "bias_se must be >= 0"),
        ("bias", np.inf, "bias is not finite"),
    ],
)
def test_bad_station_value_names_the_row(planted, column, value, message) -> None:  # type: ignore[no-untyped-def]
    st = planted.inputs.stations.copy()
    st.loc[3, column] = value
    with pytest.raises(DomainError, match=message):
        dataclasses.replace(planted.inputs, stations=st).validated()


def test_duplicate_ids_and_bad_level(planted) -> None:  # type: ignore[no-untyped-def]
    st = planted.inputs.stations
    dup = pd.concat([st, st.iloc[[2]]], ignore_index=True)
    with pytest.raises(DomainError, match="unit_id appears twice"):
        dataclasses.replace(planted.inputs, stations=dup).validated()
    with pytest.raises(ConfigError, match="'level'"):
        station_reliability_table(planted.inputs, level=95)
    with pytest.raises(SchemaError, match="expected a pandas DataFrame"):
        ReportInputs(model_meta={}, stations=st.to_dict()).validated()  # type: ignore[arg-type]


def test_minimal_inputs_without_optional_columns() -> None:
    """Only the required columns: the table is still complete, with nulls where the
    optional inputs would go."""
    stations = pd.DataFrame(
        {
            "unit_id": ["A.X.", "A.Y."],
            "station_id": ["A.X.", "A.Y."],
            "bias": [0.1, -0.1],
            "bias_se": [0.01, 0.02],
            "sigma": [0.2, 0.3],
        }
    )
    events = pd.DataFrame(
        {
            "event_id": ["e1", "e2"],
            "origin_time": pd.to_datetime(["2025-01-01", "2025-01-02"], utc=True),
            "magnitude": [2.0, 3.0],
            "se": [0.1, 0.1],
            "n_stations": [2, 2],
            "plain_mean": [2.0, 3.0],
        }
    )
    contributions = pd.DataFrame(
        {
            "event_id": ["e1", "e1", "e2", "e2"],
            "station_id": ["A.X.", "A.Y."] * 2,
            "unit_id": ["A.X.", "A.Y."] * 2,
            "corrected_magnitude": [2.1, 1.9, 3.1, 2.9],
            "weight": [0.7, 0.3, 0.7, 0.3],
            "residual": [0.1, -0.1, 0.1, -0.1],
        }
    )
    inputs = ReportInputs({}, stations, events=events, contributions=contributions).validated()
    tab = station_reliability_table(inputs)
    assert list(tab["n_readings"]) == [2, 2]
    assert tab["weight_share"].tolist() == pytest.approx([0.7, 0.3])
    assert tab["sigma_ci_low"].isna().all()  # no dof
    assert tab["n_events"].isna().all()
    assert tab["distance_t"].isna().all()
    assert (tab["flags"] == "").all()


def test_drift_text_reports_direction_and_size_from_the_fitted_epochs(planted) -> None:  # type: ignore[no-untyped-def]
    """The alarm's own CUSUM direction (-1 here) is not what the report says: the fitted step
    (+0.25, bias went up) is, with its size, the change-time interval and the alarm date."""
    ep = planted.inputs.epochs
    one = ep[ep["station_id"] == STEP_STATION].head(1).copy()
    change = pd.to_datetime(one["change_time"], utc=True)
    one = one.assign(
        direction=-1,
        step=0.25,
        step_se=0.04,
        change_time_low=change - pd.Timedelta(days=6),
        change_time_high=change + pd.Timedelta(days=8),
    )
    inputs = dataclasses.replace(planted.inputs, epochs=one)
    tab = station_reliability_table(inputs.validated())
    text = tab.loc[tab["station_id"] == STEP_STATION, "drift_alarms"].str.cat(sep="")
    low = (change - pd.Timedelta(days=6)).dt.strftime("%Y-%m-%d").iloc[0]
    high = (change + pd.Timedelta(days=8)).dt.strftime("%Y-%m-%d").iloc[0]
    assert ", up +0.25 ± 0.04" in text
    assert f"(between {low} and {high})" in text
    assert "down" not in text
