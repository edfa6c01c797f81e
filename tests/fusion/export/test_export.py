"""Exports: CSV / Parquet of fused magnitudes and model tables, QuakeML 1.2 through ObsPy.

Outside checks: pandas' and pyarrow's own readers (CSV, Parquet), the QuakeML 1.2 XML schema
as shipped with ObsPy 1.5.1 (``obspy/io/quakeml/data/QuakeML-1.2.xsd``) through lxml,
``obspy.read_events`` for the round trip, scipy's normal distribution for the 1σ level, and
the published Yellowstone table (Holt et al. 2022) for locations, channels and station ML.
"""

from __future__ import annotations

import math
import re
import warnings
from datetime import UTC, datetime
from pathlib import Path
from typing import NamedTuple

import numpy as np
import obspy
import pandas as pd
import pyarrow.parquet as pq
import pytest
from lxml import etree
from scipy import stats

import fusion.export.magnitudes as magnitudes_module
from fusion.advisory import ADVISORY
from fusion.export import (
    MAGNITUDE_COLUMNS,
    MODEL_TABLE_COLUMNS,
    export_magnitudes,
    export_model_table,
    model_table,
    readme_path,
    write_magnitudes,
    write_quakeml,
)
from fusion.export.model_tables import INTERNAL_COLUMNS
from fusion.export.quakeml import (
    QUAKEML_MAPPING,
    SE_CONFIDENCE_PERCENT,
    comment_fields,
    event_id_from_resource_id,
    event_resource_id,
)
from fusion.model.epochs import STEP_COLUMNS
from fusion.model.pair_tests import TABLE_COLUMNS
from fusion.model.parameters import StationParameters
from fusion.model.simulation import SimulatedNetwork, SimulationConfig, simulate_network
from fusion.model.station_model import STATION_TABLE_COLUMNS, StationModel
from fusion.network.gls_blocks import PairCovariance
from fusion.network.network_magnitude import fuse_events
from fusion.observations import ObservationSet
from fusion.versions.fused_store import FusedStore
from fusion.versions.model_registry import ModelRegistry, ModelVersion
from stations.errors import ConfigError, SchemaError, UnknownFormatError
from tests.datasets import YELLOWSTONE

DATA = YELLOWSTONE
QUAKEML_XSD = Path(obspy.__file__).parent / "io" / "quakeml" / "data" / "QuakeML-1.2.xsd"
NOW = datetime(2025, 7, 1, 12, 0, tzinfo=UTC)


class Chain(NamedTuple):
    store: FusedStore
    registry: ModelRegistry
    version: ModelVersion
    readings: pd.DataFrame


def _readings(net: SimulatedNetwork) -> pd.DataFrame:
    """Station-store-like rows for the simulated events: invented epicentres (the simulator's
    box in km placed at 40 N, 110 W, 1 deg ~ 111.2 km), depth 5 km, channel HHZ."""
    obs = net.observations
    x, y = net.event_xy[obs.event].T
    return pd.DataFrame(
        {
            "event_id": obs.event_ids[obs.event].astype(str),
            "station_id": obs.station_ids[obs.station].astype(str),
            "channel": "HHZ",
            "event_latitude": 40.0 + y / 111.2,
            "event_longitude": -110.0 + x / (111.2 * math.cos(math.radians(40.0))),
            "event_depth": 5.0,
        }
    )


def _fit_and_store(root: Path, config: SimulationConfig, seed: int, **fuse_kw: object) -> Chain:
    """The real chain: simulate (docs/simulation.md) -> StationModel.fit -> ModelRegistry.save ->
    fuse_events -> FusedStore.write_run."""
    net = simulate_network(config, seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = StationModel().fit(net.observations)
        registry = ModelRegistry(root)
        version = registry.save(
            model.parameters_,
            {"window": "simulated"},
            {
                "stations": model.station_table_,
                "pairs": model.pair_table_,
                "epochs": model.epoch_table_,
            },
            now=NOW,
        )
        params = registry.load_parameters(version)
        fused = fuse_events(net.observations, params, **fuse_kw)  # type: ignore[arg-type]
    store = FusedStore(root)
    store.write_run(fused, model_version=version.version_id, now=NOW)
    return Chain(store, registry, version, _readings(net))


@pytest.fixture(scope="module")
def chain(tmp_path_factory: pytest.TempPathFactory) -> Chain:
    root = tmp_path_factory.mktemp("store")
    cfg = SimulationConfig(n_stations=12, n_events=300, pair_rhos=(0.5,))
    return _fit_and_store(root, cfg, seed=3)


@pytest.fixture(scope="module")
def censored(tmp_path_factory: pytest.TempPathFactory) -> Chain:
    """Non-detections with thresholds (docs/censoring.md) and the censored likelihood."""
    root = tmp_path_factory.mktemp("censored")
    cfg = SimulationConfig(n_stations=12, n_events=300, pair_rhos=(0.5,), mode="censor")
    return _fit_and_store(root, cfg, seed=5, use_nondetections=True)


def _xsd_errors(path: Path) -> list[str]:
    schema = etree.XMLSchema(etree.parse(str(QUAKEML_XSD)))
    schema.validate(etree.parse(str(path)))
    return [str(e) for e in schema.error_log]


# -- column documentation -----------------------------------------------------------------------


def test_module_docstring_documents_every_column_with_its_unit() -> None:
    """The column list of fusion.export.magnitudes' docstring is MAGNITUDE_COLUMNS, in order."""
    doc = magnitudes_module.__doc__ or ""
    entries = re.findall(r"^``(\w+)`` \(([^;]+); from ``(\w+)``\)\n    (.+)$", doc, re.M)
    got = [(n, u, s, d) for n, u, s, d in entries]
    want = [(c.name, c.unit, c.source, c.doc) for c in MAGNITUDE_COLUMNS]
    assert got == want


def test_model_table_specs_cover_the_learner_tables() -> None:
    """Drift guard: every column the learner writes has a declared type, unit and doc."""
    assert set(STATION_TABLE_COLUMNS) == set(MODEL_TABLE_COLUMNS["stations"])
    assert set(TABLE_COLUMNS) == set(MODEL_TABLE_COLUMNS["pairs"]) | INTERNAL_COLUMNS["pairs"]
    # the learner adds unit_id to its step table (fusion.model.station_model._station_steps)
    assert set(STEP_COLUMNS) | {"unit_id"} == (
        set(MODEL_TABLE_COLUMNS["epochs"]) | INTERNAL_COLUMNS["epochs"]
    )


# -- magnitudes: CSV and Parquet ---------------------------------------------------------------


def test_csv_round_trip_through_pandas(tmp_path: Path, chain: Chain) -> None:
    """Plain CSV (header line first, no comment line); pandas reads back every value exactly
    (floats are written in shortest round-trip form)."""
    store, _, version, _ = chain
    out = tmp_path / "ml.csv"
    report = export_magnitudes(store, "ML", out, format="csv", now=NOW)
    cur = store.current("ML")
    assert report.rows == len(cur) > 100
    assert report.model_versions == (version.version_id,)
    names = [c.name for c in MAGNITUDE_COLUMNS]
    first = out.read_text(encoding="utf-8").splitlines()[0]
    assert first.replace('"', "").split(",") == names
    back = pd.read_csv(out, keep_default_na=False, na_values=[""])
    assert list(back.columns) == names
    for spec in MAGNITUDE_COLUMNS:
        got, want = back[spec.name], cur[spec.source]
        if spec.unit == "UTC":
            pd.testing.assert_series_equal(
                pd.to_datetime(got, utc=True).dt.as_unit("us"), want, check_names=False
            )
        elif want.dtype.kind in "fi":
            np.testing.assert_array_equal(got.to_numpy(float), want.to_numpy(float))
        elif want.dtype.kind == "b":
            assert list(got) == list(want)
        else:
            # text: an empty field reads back as missing (no flags -> empty field)
            assert list(got.fillna("").astype(str)) == list(want.fillna("").astype(str))
    readme = readme_path(out).read_text(encoding="utf-8")
    assert ADVISORY in readme
    for spec in MAGNITUDE_COLUMNS:
        assert re.search(rf"^{spec.name}\s+{re.escape(spec.unit)}\s+", readme, re.M), spec.name
    assert version.version_id in readme


def test_parquet_carries_units_advisory_and_values(tmp_path: Path, chain: Chain) -> None:
    store, _, version, _ = chain
    out = tmp_path / "ml.parquet"
    export_magnitudes(store, "ML", out, format="parquet", now=NOW)
    schema = pq.read_schema(out)  # pyarrow's reader
    assert schema.metadata[b"magfuse.advisory"].decode() == ADVISORY
    assert schema.metadata[b"magfuse.model_versions"].decode() == version.version_id
    for spec in MAGNITUDE_COLUMNS:
        meta = schema.field(spec.name).metadata
        assert (meta[b"unit"].decode(), meta[b"doc"].decode()) == (spec.unit, spec.doc)
    back = pq.read_table(out).to_pandas()
    cur = store.current("ML")
    np.testing.assert_array_equal(back["mag"], cur["magnitude"])
    np.testing.assert_array_equal(back["mag_uncertainty"], cur["se"])
    np.testing.assert_array_equal(back["station_count"], cur["n_stations"])
    assert ADVISORY in readme_path(out).read_text(encoding="utf-8")


def test_unstored_results_need_a_model_version(tmp_path: Path) -> None:
    net = simulate_network(SimulationConfig(n_stations=6, n_events=30, pair_rhos=()), seed=1)
    k = net.observations.n_stations
    ids = net.observations.station_ids
    nat = np.full(k, np.datetime64("NaT", "us"))
    params = StationParameters(
        "ML", ids, ids, nat, nat, net.bias, np.zeros(k), net.sigma**2, np.zeros(k, bool),
        net.pairs, 0.04, 0.05,
    )  # fmt: skip
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        events = fuse_events(net.observations, params).events
    with pytest.raises(SchemaError, match="pass model_version= for results"):
        write_magnitudes(events, tmp_path / "x.csv")
    report = write_magnitudes(
        events, tmp_path / "x.csv", model_version="ML-dry", evaluation_status="preliminary"
    )
    back = pd.read_csv(tmp_path / "x.csv")
    assert report.rows == len(events) and set(back["model_version"]) == {"ML-dry"}
    assert back["run_id"].isna().all() and back["fused_at"].isna().all()


def test_empty_export_and_bad_targets(tmp_path: Path) -> None:
    store = FusedStore(tmp_path)
    report = export_magnitudes(store, "mb", tmp_path / "mb.csv", now=NOW)
    assert report.rows == 0
    assert (tmp_path / "mb.csv").read_text().strip().replace('"', "").split(",")[0] == "event_id"
    with pytest.raises(UnknownFormatError, match="choose one of csv, parquet, quakeml"):
        export_magnitudes(store, "mb", tmp_path / "mb.x", format="xlsx")
    with pytest.raises(ConfigError, match="folder does not exist"):
        export_magnitudes(store, "mb", tmp_path / "missing" / "mb.csv")
    with pytest.raises(ConfigError, match="is a folder"):
        export_magnitudes(store, "mb", tmp_path)


# -- model tables -------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
@pytest.mark.parametrize("name", ["stations", "pairs", "epochs"])
def test_model_tables_round_trip(tmp_path: Path, chain: Chain, name: str, fmt: str) -> None:
    _, registry, version, _ = chain
    out = tmp_path / f"{name}.{fmt}"
    report = export_model_table(registry, version.version_id, name, out, format=fmt, now=NOW)
    frame = registry.load_table(version, name)
    assert report.rows == len(frame) and report.model_versions == (version.version_id,)
    back = (
        pd.read_csv(out, keep_default_na=False, na_values=[""])
        if fmt == "csv"
        else pq.read_table(out).to_pandas()
    )
    specs = MODEL_TABLE_COLUMNS[name]
    kept = [c for c in frame.columns if c not in INTERNAL_COLUMNS.get(name, ())]
    assert set(back.columns) >= {specs[c].name for c in kept}
    for col in kept:
        got = back[specs[col].name]
        if frame[col].dtype.kind == "f":
            np.testing.assert_array_equal(got.to_numpy(float), frame[col].to_numpy(float))
        elif frame[col].dtype.kind in "ib":
            assert list(got) == list(frame[col])
    readme = readme_path(out).read_text(encoding="utf-8")
    assert ADVISORY in readme and version.version_id in readme
    if fmt == "parquet":
        schema = pq.read_schema(out)
        assert schema.metadata[b"magfuse.advisory"].decode() == ADVISORY
        for col in kept:
            spec = specs[col]
            assert schema.field(spec.name).metadata[b"unit"].decode() == spec.unit


def test_model_table_columns_and_errors(tmp_path: Path, chain: Chain) -> None:
    _, registry, version, _ = chain
    frame = registry.load_table(version, "stations")
    assert model_table(frame, "stations").schema.field("bias").metadata[b"unit"] == (
        b"magnitude units"
    )
    extra = model_table(frame.assign(new_score=1.5), "stations")
    assert extra.schema.field("new_score").metadata[b"doc"] == b"(undocumented column)"
    with pytest.raises(SchemaError, match="'bad' holds object values"):
        model_table(frame.assign(bad=[{"a": 1}] * len(frame)), "stations")
    with pytest.raises(UnknownFormatError, match="choose csv, parquet"):
        export_model_table(registry, version, "stations", tmp_path / "s.xml", format="quakeml")


_DESIGN_SYMBOLS = ("T_self", "T_model", "c_hat", "rho_hat", "safe-cells", "undocumented")


@pytest.mark.parametrize("name", ["stations", "pairs", "epochs"])
def test_model_table_exports_describe_every_column_without_internal_codes(
    tmp_path: Path, chain: Chain, name: str
) -> None:
    """The sidecar describes every column the file has; no integer row codes (station, k, l)
    and no design-document symbols reach the file or its sidecar."""
    _, registry, version, _ = chain
    out = tmp_path / f"{name}.csv"
    report = export_model_table(registry, version, name, out, format="csv", now=NOW)
    header = out.read_text(encoding="utf-8").splitlines()[0].replace('"', "").split(",")
    readme = readme_path(out).read_text(encoding="utf-8")
    assert report.notes == ()
    assert not {"station", "k", "l"} & set(header)
    for col in header:
        row = re.search(rf"^{col}\s+\S+\s+(.+)$", readme, re.M)
        assert row is not None and row[1].strip(), col
    for symbol in _DESIGN_SYMBOLS:
        assert symbol not in readme and symbol not in header, symbol
    if name != "pairs":
        assert "station epoch" in readme  # what a unit is, said where unit ids appear
    else:  # status values in the one style of every name magfuse writes (fusion.flags)
        status = pd.read_csv(out, keep_default_na=False)["status"]
        assert status.str.fullmatch(r"[a-z]+(-[a-z]+)*").all(), set(status)


def test_epochs_export_names_the_unit_after_the_step(tmp_path: Path) -> None:
    """unit_before is the epoch whose readings alarmed, unit_after the station-table unit that
    starts at change_time."""
    steps = pd.DataFrame(
        {
            "station_id": ["ZZ.S01.", "ZZ.S02."],
            "station": [0, 1],
            "change_time": pd.to_datetime(["2025-05-26T07:35:50Z", "2025-06-01T00:00:00Z"]),
            "alarm_time": pd.to_datetime(["2025-05-28T00:00:00Z", "2025-06-03T00:00:00Z"]),
            "direction": [1, -1],
            "n_before": [10, 20],
            "n_after": [30, 40],
            "peak": [8.0, 9.0],
            "shift_z": [0.5, -0.5],
            "unit_id": ["ZZ.S01.", "ZZ.S02."],
        }
    )
    stations = pd.DataFrame(
        {
            "unit_id": ["ZZ.S01.", "ZZ.S01.@2025-05-26", "ZZ.S02."],
            "station_id": ["ZZ.S01.", "ZZ.S01.", "ZZ.S02."],
            "epoch_start": pd.to_datetime([None, "2025-05-26T07:35:50Z", None]),
        }
    )
    table = model_table(steps, "epochs", stations=stations).to_pandas()
    assert list(table["unit_before"]) == ["ZZ.S01.", "ZZ.S02."]
    assert table["unit_after"].iloc[0] == "ZZ.S01.@2025-05-26"
    assert pd.isna(table["unit_after"].iloc[1])  # the model has no epoch starting there
    assert "station" not in table.columns


def test_magnitude_sidecar_explains_every_method_and_flag(tmp_path: Path, chain: Chain) -> None:
    from fusion.flags import EVENT_FLAGS, METHODS, ROW_FLAGS

    store, _, _, readings = chain
    csv, xml = tmp_path / "m.csv", tmp_path / "m.xml"
    export_magnitudes(store, "ML", csv, now=NOW)
    export_magnitudes(store, "ML", xml, format="quakeml", readings=readings, now=NOW)
    for path, tables in ((csv, (METHODS, EVENT_FLAGS)), (xml, (METHODS, EVENT_FLAGS, ROW_FLAGS))):
        readme = readme_path(path).read_text(encoding="utf-8")
        for table in tables:
            for name, meaning in table.items():
                assert re.search(rf"^  {re.escape(name)} +{re.escape(meaning)}$", readme, re.M)


# -- QuakeML ------------------------------------------------------------------------------------


def test_quakeml_is_schema_valid_and_round_trips(tmp_path: Path, chain: Chain) -> None:
    """Write, validate against the QuakeML 1.2 XSD, read back with obspy.read_events: the
    magnitudes, uncertainties, levels, counts, weights and residuals are those of the store
    (QuakeML text keeps Python's shortest float repr, so equality is exact)."""
    store, _, version, readings = chain
    out = tmp_path / "ml.xml"
    report = export_magnitudes(store, "ML", out, format="quakeml", readings=readings, now=NOW)
    assert _xsd_errors(out) == []
    cur = store.current("ML")
    rows = store.current_contributions("ML", cur)
    detected = rows[rows["detected"]].groupby("event_id", sort=False, observed=True)
    cat = obspy.read_events(str(out))
    assert len(cat) == report.rows == len(cur)
    assert cat.comments[0].text == ADVISORY
    by_id = {event_id_from_resource_id(str(e.resource_id)): e for e in cat}
    level_1sigma = 100.0 * (stats.norm.cdf(1.0) - stats.norm.cdf(-1.0))  # scipy, independent
    assert pytest.approx(level_1sigma, abs=1e-12) == SE_CONFIDENCE_PERCENT
    for ev in cur.itertuples():
        qe = by_id[ev.event_id]
        (mag,) = qe.magnitudes
        assert mag.mag == ev.magnitude
        assert mag.mag_errors.uncertainty == ev.se
        assert mag.mag_errors.confidence_level == pytest.approx(level_1sigma, abs=1e-12)
        assert mag.station_count == ev.n_stations
        assert mag.magnitude_type == "ML"
        assert str(mag.method_id) == f"smi:magfuse.invalid/method/{ev.method}"
        assert (mag.evaluation_mode, mag.evaluation_status) == ("automatic", "preliminary")
        assert mag.creation_info.version == version.version_id
        assert mag.creation_info.creation_time == obspy.UTCDateTime(NOW)
        (origin,) = qe.origins
        assert origin.time == obspy.UTCDateTime(ev.origin_time.to_pydatetime())
        assert str(mag.origin_id) == str(origin.resource_id) == str(qe.preferred_origin_id)
        mine = detected.get_group(ev.event_id)
        sms = {str(s.resource_id): s for s in qe.station_magnitudes}
        contribs = mag.station_magnitude_contributions
        assert len(contribs) == len(mine) == ev.n_stations
        for c, r in zip(contribs, mine.itertuples(), strict=True):
            sm = sms[str(c.station_magnitude_id)]
            assert (c.weight, c.residual) == (r.weight, r.residual)
            assert sm.mag == r.corrected_magnitude
            fields = comment_fields(sm.comments[0].text)
            assert float(fields["station_correction"]) == r.correction
            assert float(fields["magnitude_as_read"]) == r.magnitude
            assert sm.waveform_id.get_seed_string() == f"{r.station_id}.HHZ"  # NET.STA.LOC.CHA
            assert str(sm.origin_id) == str(origin.resource_id)
            # QuakeML's relation, from the file alone: residual = station mag - network mag
            assert c.residual == pytest.approx(sm.mag - mag.mag, abs=1e-12)
        if ev.method in ("gls", "robust-gls", "single-station"):
            total = sum(c.weight * sms[str(c.station_magnitude_id)].mag for c in contribs)
            assert total == pytest.approx(mag.mag, abs=1e-9)  # weights are normalised GLS


def test_quakeml_preferred_magnitude_is_the_fused_one(tmp_path: Path, chain: Chain) -> None:
    """obspy's Event.preferred_magnitude() finds the network magnitude of every event."""
    store, _, _, readings = chain
    out = tmp_path / "ml.xml"
    export_magnitudes(store, "ML", out, format="quakeml", readings=readings, now=NOW)
    cat = obspy.read_events(str(out))
    assert len(cat) > 0
    for ev in cat:
        (mag,) = ev.magnitudes
        assert ev.preferred_magnitude() is not None
        assert ev.preferred_magnitude().resource_id == mag.resource_id


def test_quakeml_sidecar_names_only_columns_the_magnitude_export_has(
    tmp_path: Path, chain: Chain
) -> None:
    """Every bare column name in the sidecar's mapping is a column of the CSV/Parquet export."""
    store, _, _, readings = chain
    out = tmp_path / "ml.xml"
    export_magnitudes(store, "ML", out, format="quakeml", readings=readings, now=NOW)
    readme = readme_path(out).read_text(encoding="utf-8")
    exported = {c.name for c in MAGNITUDE_COLUMNS}
    named = set()
    for element, source, _unit in QUAKEML_MAPPING:
        assert element in readme
        named |= {w for w in re.split(r"[ ,;()]+", source) if re.fullmatch(r"[a-z]+_[a-z_]+", w)}
        if re.fullmatch(r"[a-z_]+", source):
            named.add(source)
    named -= {"station_correction", "magnitude_as_read"}  # keys of the comment, see its notes
    assert named and named <= exported, sorted(named - exported)


def test_quakeml_leaves_out_nondetections_and_events_without_magnitude(
    tmp_path: Path, censored: Chain
) -> None:
    cur = censored.store.current("ML")
    rows = censored.store.current_contributions("ML", cur)
    assert (~rows["detected"]).sum() > 100
    gone = cur["event_id"].iloc[0]
    cur.loc[cur.index[0], "magnitude"] = np.nan  # as for a 'no-usable-detection' event
    report = write_quakeml(cur, rows, tmp_path / "c.xml", readings=censored.readings, now=NOW)
    assert (report.rows, report.skipped) == (len(cur) - 1, 1)
    assert _xsd_errors(tmp_path / "c.xml") == []
    cat = obspy.read_events(str(tmp_path / "c.xml"))
    ids = {event_id_from_resource_id(str(e.resource_id)) for e in cat}
    assert gone not in ids
    n_sm = sum(len(e.station_magnitudes) for e in cat)
    kept = rows[rows["detected"] & (rows["event_id"] != gone)]
    assert n_sm == len(kept)
    assert "no fused magnitude" in readme_path(tmp_path / "c.xml").read_text()


def test_quakeml_without_locations_keeps_magnitudes_only(tmp_path: Path, chain: Chain) -> None:
    """QuakeML 1.2 requires lat/lon on an origin and an origin on a station magnitude: without
    locations the file is still schema-valid, with the network magnitude, its station count
    and the origin time in an event comment."""
    store = chain.store
    report = export_magnitudes(store, "ML", tmp_path / "n.xml", format="quakeml", now=NOW)
    assert _xsd_errors(tmp_path / "n.xml") == []
    cur = store.current("ML")
    assert report.rows == len(cur) and "no known location" in report.notes[0]
    cat = obspy.read_events(str(tmp_path / "n.xml"))
    for qe, ev in zip(cat, cur.itertuples(), strict=True):
        assert qe.origins == [] and qe.station_magnitudes == []
        assert qe.magnitudes[0].mag == ev.magnitude
        assert qe.magnitudes[0].station_count == ev.n_stations
        stamp = comment_fields(qe.comments[0].text)["origin_time"]
        assert obspy.UTCDateTime(stamp) == obspy.UTCDateTime(ev.origin_time.to_pydatetime())


def test_quakeml_interval_uncertainty(tmp_path: Path, chain: Chain) -> None:
    """uncertainty='interval': half-width of the stored interval, level in percent."""
    store = chain.store
    cur = store.current("ML").iloc[:20]
    rows = store.current_contributions("ML", cur)
    write_quakeml(
        cur, rows, tmp_path / "i.xml", readings=chain.readings, uncertainty="interval", now=NOW
    )
    cat = obspy.read_events(str(tmp_path / "i.xml"))
    for qe, ev in zip(cat, cur.itertuples(), strict=True):
        err = qe.magnitudes[0].mag_errors
        assert err.uncertainty == pytest.approx((ev.ci_high - ev.ci_low) / 2, rel=1e-12)
        assert err.confidence_level == pytest.approx(100 * ev.confidence_level, rel=1e-12)
        z = stats.norm.ppf(0.5 + ev.confidence_level / 2)  # interval = mag ± z·SE
        assert err.uncertainty == pytest.approx(z * ev.se, rel=1e-9)
    with pytest.raises(ConfigError, match="'uncertainty' parameter"):
        write_quakeml(cur, rows, tmp_path / "j.xml", uncertainty="2sigma")  # type: ignore[arg-type]
    with pytest.raises(SchemaError, match="needs the station contributions"):
        write_magnitudes(cur, tmp_path / "k.xml", format="quakeml")


@pytest.mark.parametrize(
    "event_id",
    ["sim0001", "us7000abcd", "ev 12/3 ~é", "smi:org.gfz-potsdam.de/geofon/gfz2025abcd"],
)
def test_event_ids_round_trip_and_fit_the_quakeml_pattern(event_id: str) -> None:
    """QuakeML ResourceIdentifier pattern from QuakeML-BED-1.2.xsd; source smi ids kept."""
    rid = event_resource_id(event_id)
    pattern = (
        r"(smi|quakeml):[\w\d][\w\d\-\.\*\(\)_~']{2,}/[\w\d\-\.\*\(\)_~']"
        r"[\w\d\-\.\*\(\)\+\?_~'=,;#/&]*"
    )
    assert re.fullmatch(pattern, rid)
    assert event_id_from_resource_id(rid) == event_id
    if event_id.startswith("smi:"):
        assert rid == event_id


def test_quakeml_of_yellowstone_events_matches_the_published_table(tmp_path: Path) -> None:
    """UUSS Yellowstone (Holt et al. 2022): fuse 60 events with zero biases and equal σ, so
    the network ML is the mean of SML − Corr; the QuakeML has the published epicentre, depth
    (m), network/station/channel codes and that mean, compared with pandas on the raw CSV."""
    from stations.readers.yellowstone import read_yellowstone

    records = read_yellowstone(DATA / "station_ml_geobalanced.csv").records
    ids = records["event_id"].drop_duplicates().iloc[:60]
    records = records[records["event_id"].isin(ids)]
    obs = ObservationSet.from_frame(records)
    k = obs.n_stations
    nat = np.full(k, np.datetime64("NaT", "us"))
    params = StationParameters(
        "ML", obs.station_ids, obs.station_ids, nat, nat, np.zeros(k), np.zeros(k),
        np.full(k, 0.21**2), np.zeros(k, bool), PairCovariance.empty(k),
        0.04, 0.0441,
    )  # fmt: skip
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fused = fuse_events(obs, params, robust_min_stations=1000)
    store = FusedStore(tmp_path)
    store.write_run(fused, model_version="ML-uuss-equal", now=NOW)
    out = tmp_path / "uuss.xml"
    report = export_magnitudes(store, "ML", out, format="quakeml", readings=records, now=NOW)
    assert report.rows == 60 and report.notes == ()
    assert _xsd_errors(out) == []

    raw = pd.read_csv(DATA / "station_ml_geobalanced.csv")
    raw = raw[raw["Corr"].notna() & raw["Evid"].astype(str).isin(ids)]
    per_event = raw.assign(m=(raw["SML"] - raw["Corr"]).round(2)).groupby(raw["Evid"].astype(str))
    cat = obspy.read_events(str(out))
    for qe in cat:
        eid = event_id_from_resource_id(str(qe.resource_id))
        first = raw[raw["Evid"].astype(str) == eid].iloc[0]
        (origin,) = qe.origins
        assert (origin.latitude, origin.longitude) == (first["EqLat"], first["EqLon"])
        assert origin.depth == pytest.approx(first["EqDep"] * 1000.0, abs=1e-6)
        assert qe.preferred_origin_id == origin.resource_id
        assert str(qe.magnitudes[0].origin_id) == str(origin.resource_id)
        assert qe.magnitudes[0].mag == pytest.approx(per_event["m"].mean()[eid], abs=1e-9)
        codes = {
            (s.waveform_id.network_code, s.waveform_id.station_code, s.waveform_id.channel_code)
            for s in qe.station_magnitudes
        }
        mine = raw[raw["Evid"].astype(str) == eid]
        want = set(zip(mine["Net"], mine["Sta"], mine["Cmp"], strict=True))
        assert codes == want


def test_quakeml_is_deterministic(tmp_path: Path, chain: Chain) -> None:
    """Same input, same export time: byte-identical files (all ids derived, none random)."""
    store = chain.store
    kw = {"format": "quakeml", "readings": chain.readings, "now": NOW}
    a = export_magnitudes(store, "ML", tmp_path / "a.xml", **kw)  # type: ignore[arg-type]
    b = export_magnitudes(store, "ML", tmp_path / "b.xml", **kw)  # type: ignore[arg-type]
    assert Path(a.path).read_bytes() == Path(b.path).read_bytes()


def test_docstring_examples() -> None:
    import doctest

    import fusion.export

    result = doctest.testmod(fusion.export)
    assert result.failed == 0 and result.attempted > 0
