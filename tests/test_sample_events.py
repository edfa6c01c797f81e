"""The invented demo network of ``sample_events/``: reproducibility, counts, truth consistency.

The data are synthetic, so most checks compare the data files with the truth files written
beside them. Outside references: the IASPEI standard ML formula (docs/check-values.md §1
[IASPEI-web], verified; its worked examples docs/check-values.md §3, computed), obspy's geodetics
(``gps2dist_azimuth``, ``locations2degrees``) for the distance columns, obspy's QuakeML reader for
the December file, and Fisher's z transform for the pair correlations (Fisher 1921; docs/pairs.md,
from memory).
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from obspy.core.event import Catalog

import sample_events
from sample_events import (
    FILE_NAMES,
    SAMPLE_DIR,
    demo_csv_path,
    demo_quakeml_path,
    demo_stations_path,
    demo_truth_paths,
)
from sample_events.generate_demo import CSV_COLUMNS, DEMO_SEED, generate_demo

# The header the brief prescribes, in this order (issue 2 item 7).
BRIEF_COLUMNS = (
    "event_id",
    "origin_time",
    "event_latitude",
    "event_longitude",
    "event_depth",
    "network",
    "station",
    "location",
    "channel",
    "magnitude_type",
    "magnitude",
    "detected",
    "noise_threshold",
    "amplitude",
    "amplitude_unit",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
    "clipped",
)
NUMERIC = (
    "event_latitude",
    "event_longitude",
    "event_depth",
    "magnitude",
    "noise_threshold",
    "amplitude",
    "period",
    "distance_km",
    "distance_deg",
    "hypocentral_distance_km",
    "azimuth",
    "source_weight",
)
TRUTH_NUMERIC = (
    "bias",
    "sigma",
    "latitude",
    "longitude",
    "elevation",
    "noise_amplitude_nm",
    "clip_amplitude_nm",
)
# Largest error of log10(A) when A is rounded to 4 significant digits: log10(1 + 5e-4).
AMPLITUDE_ROUNDING = float(np.log10(1.0005))


def iaspei_ml(amplitude_nm: np.ndarray, r_km: np.ndarray) -> np.ndarray:
    """ML = log10(A) + 1.11 log10(R) + 0.00189 R - 2.09, A in nm (Wood-Anderson, magnification
    1), R hypocentral km: IASPEI standard, docs/check-values.md §1 [IASPEI-web] (verified)."""
    return np.log10(amplitude_nm) + 1.11 * np.log10(r_km) + 0.00189 * r_km - 2.09


# -- fixtures ----------------------------------------------------------------------------------


def _read_text_csv(path: Path) -> pd.DataFrame:
    """Read a demo CSV keeping empty codes as '' (not NaN), then parse the number columns."""
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    for name in frame.columns:
        if name in NUMERIC or name in TRUTH_NUMERIC:
            frame[name] = pd.to_numeric(frame[name].replace("", np.nan))
    return frame


@pytest.fixture(scope="module")
def readings() -> pd.DataFrame:
    frame = _read_text_csv(demo_csv_path())
    frame["detected"] = frame["detected"].map({"true": True, "false": False})
    frame["clipped"] = frame["clipped"].map({"true": True, "false": False})
    frame["station_id"] = frame["network"] + "." + frame["station"] + "." + frame["location"]
    frame["time"] = pd.to_datetime(frame["origin_time"], utc=True, format="ISO8601")
    return frame


@pytest.fixture(scope="module")
def truth_stations() -> pd.DataFrame:
    return _read_text_csv(demo_truth_paths().stations).set_index("station_id")


@pytest.fixture(scope="module")
def truth_events() -> pd.DataFrame:
    frame = pd.read_csv(demo_truth_paths().events, dtype={"event_id": str})
    frame["time"] = pd.to_datetime(frame["origin_time"], utc=True, format="ISO8601")
    return frame.set_index("event_id")


@pytest.fixture(scope="module")
def truth_steps() -> pd.DataFrame:
    frame = pd.read_csv(demo_truth_paths().steps, dtype=str, keep_default_na=False)
    for name in ("step", "bias_before", "bias_after"):
        frame[name] = frame[name].astype(float)
    frame["time"] = pd.to_datetime(frame["time"], utc=True, format="ISO8601")
    return frame


@pytest.fixture(scope="module")
def truth_outliers() -> pd.DataFrame:
    frame = pd.read_csv(demo_truth_paths().outliers, dtype=str, keep_default_na=False)
    frame["offset"] = frame["offset"].astype(float)
    frame["detected"] = frame["detected"].map({"true": True, "false": False})
    return frame


@pytest.fixture(scope="module")
def station_epochs() -> pd.DataFrame:
    frame = _read_text_csv(demo_stations_path())
    frame["station_id"] = frame["network"] + "." + frame["station"] + "." + frame["location"]
    frame["start"] = pd.to_datetime(frame["start"], utc=True, format="ISO8601")
    frame["end"] = pd.to_datetime(frame["end"].replace("", None), utc=True, format="ISO8601")
    return frame


@pytest.fixture(scope="module")
def clean(
    readings: pd.DataFrame,
    truth_stations: pd.DataFrame,
    truth_events: pd.DataFrame,
    truth_steps: pd.DataFrame,
    truth_outliers: pd.DataFrame,
) -> pd.DataFrame:
    """Detected, unclipped readings with their true error e = m - M - b_i(t) and margin.

    ``margin`` = (M + b_i(t) - noise_threshold) / sigma_i: how far the noise-free reading lies
    above the station's noise level, in units of sigma_i. It depends on the true magnitude, not
    on the error, so selecting on it leaves e unbiased (a station with margin >= 3 detects with
    probability Phi(3) = 0.9987 whatever e is).
    """
    det = readings[readings["detected"] & ~readings["clipped"]].copy()
    det["M"] = truth_events.loc[det["event_id"], "magnitude"].to_numpy()
    bias = truth_stations.loc[det["station_id"], "bias"].to_numpy()
    sigma = truth_stations.loc[det["station_id"], "sigma"].to_numpy()
    for sid, when, size in zip(
        truth_steps["station_id"], truth_steps["time"], truth_steps["step"], strict=True
    ):
        after = (det["station_id"] == sid) & (det["time"] >= when)
        bias = bias + np.where(after, float(size), 0.0)
    det["b_t"] = bias
    det["sigma"] = sigma
    det["error"] = det["magnitude"] - det["M"] - bias
    det["margin"] = (det["M"] + bias - det["noise_threshold"]) / sigma
    flagged = set(zip(truth_outliers["event_id"], truth_outliers["station_id"], strict=True))
    det["outlier"] = [
        (e, s) in flagged for e, s in zip(det["event_id"], det["station_id"], strict=True)
    ]
    return det


@pytest.fixture(scope="module")
def december() -> Catalog:
    from obspy import read_events

    return read_events(str(demo_quakeml_path()))


# -- reproducibility -------------------------------------------------------------------------


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_generator_reproduces_the_committed_files_byte_for_byte(tmp_path: Path) -> None:
    paths = generate_demo(tmp_path, seed=DEMO_SEED)
    written = {p.name for p in paths.all()}
    assert written == set(FILE_NAMES.values())
    for p in paths.all():
        assert _sha256(p) == _sha256(SAMPLE_DIR / p.name), f"{p.name} differs from the commit"


def test_readme_lists_the_hash_of_every_committed_file() -> None:
    text = (SAMPLE_DIR / "README.md").read_text(encoding="utf-8")
    listed = dict(
        (name, digest) for digest, name in re.findall(r"^([0-9a-f]{64})  (\S+)$", text, re.M)
    )
    assert set(listed) == set(FILE_NAMES.values())
    for name, digest in listed.items():
        assert _sha256(SAMPLE_DIR / name) == digest, f"README hash of {name} is stale"


def test_path_helpers_point_at_the_files_and_name_the_fix_when_missing(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    assert demo_csv_path().name == "demo_network_2025.csv"
    assert demo_quakeml_path().suffix == ".xml"
    assert demo_stations_path().is_file()
    truth = demo_truth_paths()
    assert all(p.is_file() for p in (truth.stations, truth.events, truth.pairs, truth.steps))
    monkeypatch.setattr(sample_events, "SAMPLE_DIR", tmp_path)
    with pytest.raises(FileNotFoundError, match=r"python -m sample_events\.generate_demo"):
        demo_csv_path()


# -- the CSV as the brief describes it ---------------------------------------------------------


def test_csv_header_and_cell_conventions(readings: pd.DataFrame) -> None:
    with demo_csv_path().open(encoding="utf-8") as fh:
        header = fh.readline().rstrip("\n").split(",")
    assert tuple(header) == BRIEF_COLUMNS == CSV_COLUMNS
    det = readings["detected"].to_numpy()
    assert set(readings["magnitude_type"]) == {"ML"}
    assert (readings["amplitude_unit"].to_numpy() == np.where(det, "nm", "")).all()
    assert readings["source_weight"].isna().all()
    assert readings.loc[det, ["magnitude", "amplitude", "period"]].notna().all().all()
    assert readings.loc[~det, ["magnitude", "amplitude", "period"]].isna().all().all()
    assert not readings.loc[~det, "clipped"].any()
    assert readings["noise_threshold"].notna().all()
    assert readings["origin_time"].str.fullmatch(r"2025-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z").all()
    # A few MB at most (the brief); measured 4.6 MB.
    assert demo_csv_path().stat().st_size < 6_000_000


def test_counts_are_within_the_ranges_of_the_brief(
    readings: pd.DataFrame, truth_stations: pd.DataFrame, truth_events: pd.DataFrame
) -> None:
    det = readings[readings["detected"]]
    n_events = readings["event_id"].nunique()
    assert 2000 <= n_events <= 3000
    assert set(readings["event_id"]) == set(truth_events.index)
    assert det["event_id"].nunique() == n_events  # every kept event has a detection
    assert 38 <= len(truth_stations) <= 42
    per_event = det.groupby("event_id").size()
    assert 6 <= per_event.median() <= 10
    assert readings["time"].dt.year.eq(2025).all()
    # Gutenberg-Richter with b = 1 from M 0.8: mean excess magnitude 1/(b ln 10) = 0.434
    # (Aki 1965 maximum-likelihood b estimator read backwards, from memory); kept events are
    # nearly all candidates, so the truth follows it closely.
    excess = truth_events["magnitude"].to_numpy() - 0.8
    assert excess.min() >= 0.0
    assert abs(excess.mean() - 1.0 / np.log(10.0)) < 4.0 * 0.434 / np.sqrt(len(excess))


def test_rows_exist_only_for_operating_stations_within_250_km(
    readings: pd.DataFrame, station_epochs: pd.DataFrame
) -> None:
    assert readings["distance_km"].max() <= 250.0
    # Installed stations within 245 km on a 6371-km sphere (haversine) are surely inside the
    # 250-km WGS84 processing radius (the sphere differs by < 0.5 %); about 92 % of them must
    # have a row (operating), the rest were down.
    events = readings.drop_duplicates("event_id")[
        ["event_id", "time", "event_latitude", "event_longitude"]
    ]
    sites = station_epochs.drop_duplicates("station_id")
    lat1 = np.radians(events["event_latitude"].to_numpy())[:, None]
    lon1 = np.radians(events["event_longitude"].to_numpy())[:, None]
    lat2 = np.radians(sites["latitude"].to_numpy())[None, :]
    lon2 = np.radians(sites["longitude"].to_numpy())[None, :]
    hav = (
        np.sin((lat2 - lat1) / 2) ** 2
        + np.cos(lat1) * np.cos(lat2) * np.sin((lon2 - lon1) / 2) ** 2
    )
    dist = 2.0 * 6371.0 * np.arcsin(np.sqrt(hav))
    first_start = station_epochs.groupby("station_id")["start"].min()
    installed = (
        events["time"].to_numpy()[:, None]
        >= (first_start.loc[sites["station_id"]].to_numpy()[None, :])
    )
    near = (dist < 245.0) & installed
    have = pd.MultiIndex.from_frame(readings[["event_id", "station_id"]])
    grid = pd.MultiIndex.from_product([events["event_id"], sites["station_id"]])
    present = grid.isin(have).reshape(near.shape)
    fraction = present[near].mean()
    assert 0.89 <= fraction <= 0.95, fraction


def test_amplitude_gives_back_the_magnitude_through_the_iaspei_formula(
    readings: pd.DataFrame,
) -> None:
    # The formula as written here reproduces the worked examples of docs/check-values.md §3
    # (computed from the verified IASPEI formula; tolerance 1e-4 as there).
    examples = [(1e6 / 2080.0, 100.0, 3.0009), (100.0, 10.0, 1.0389), (1000.0, 100.0, 3.3190)]
    examples.append((5000.0, 500.0, 5.5498))
    for amp, r, ml in examples:
        assert iaspei_ml(np.array(amp), np.array(r)) == pytest.approx(ml, abs=1e-4)
    det = readings[readings["detected"]]
    back = iaspei_ml(det["amplitude"].to_numpy(), det["hypocentral_distance_km"].to_numpy())
    assert np.max(np.abs(back - det["magnitude"].to_numpy())) <= AMPLITUDE_ROUNDING + 1e-9


def test_detections_clear_the_noise_threshold_and_thresholds_follow_the_noise(
    readings: pd.DataFrame, truth_stations: pd.DataFrame
) -> None:
    det = readings[readings["detected"]]
    assert (det["magnitude"] >= det["noise_threshold"]).all()
    # noise_threshold is the pre-event noise amplitude through the same formula: removing the
    # distance term leaves log10(noise amplitude), whose per-station median must match the truth
    # (per-reading spread 0.1 in log10, so the median of >= 50 rows is good to about 0.02).
    r = readings["hypocentral_distance_km"].to_numpy()
    log_noise = readings["noise_threshold"].to_numpy() - iaspei_ml(np.ones_like(r), r)
    med = pd.Series(log_noise).groupby(readings["station_id"].to_numpy()).median()
    n = readings.groupby("station_id").size()
    truth = np.log10(truth_stations.loc[med.index, "noise_amplitude_nm"])
    big = n.loc[med.index] >= 50
    assert np.max(np.abs((med - truth)[big])) < 0.05
    # Stored rounding: thresholds carry 3 decimals.
    assert np.allclose(readings["noise_threshold"], readings["noise_threshold"].round(3))


def test_distance_columns_agree_with_obspy_geodetics(
    readings: pd.DataFrame, station_epochs: pd.DataFrame
) -> None:
    from obspy.geodetics import gps2dist_azimuth, locations2degrees

    sites = station_epochs.drop_duplicates("station_id").set_index("station_id")
    sample = readings.sample(n=150, random_state=7)
    for row in sample.itertuples():
        site = sites.loc[str(row.station_id)]
        dist_m, az, _ = gps2dist_azimuth(
            row.event_latitude, row.event_longitude, site.latitude, site.longitude
        )
        # Columns are rounded to 0.1 km, 0.001 deg and 0.1 deg.
        assert abs(dist_m / 1000.0 - row.distance_km) <= 0.05 + 1e-6
        assert abs((az - row.azimuth + 180.0) % 360.0 - 180.0) <= 0.05 + 1e-6
        deg = locations2degrees(
            row.event_latitude, row.event_longitude, site.latitude, site.longitude
        )
        assert abs(deg - row.distance_deg) <= 0.0005 + 1e-9
    # Hypocentral distance: sqrt(epicentral^2 + depth^2) of the stored values, to 0.1 km.
    hyp = np.hypot(readings["distance_km"], readings["event_depth"])
    assert np.max(np.abs(hyp - readings["hypocentral_distance_km"])) <= 0.05 + 1e-9


# -- the truth ---------------------------------------------------------------------------------


def test_errors_have_the_stated_sd_and_no_offset(clean: pd.DataFrame) -> None:
    sel = clean[(clean["margin"] >= 3.0) & ~clean["outlier"]]
    z = (sel["error"] / sel["sigma"]).to_numpy()
    assert len(z) > 5000
    assert abs(z.mean()) < 4.0 / np.sqrt(len(z))
    # SD of a normal sample: SE(s)/s = 1/sqrt(2n).
    assert abs(z.std(ddof=1) - 1.0) < 4.0 / np.sqrt(2.0 * len(z))
    by_station = sel.groupby("station_id")
    ratio = by_station["error"].std() / by_station["sigma"].first()
    counts = by_station.size()
    assert ratio[counts >= 40].median() == pytest.approx(1.0, abs=0.06)


def test_flagged_outliers_explain_every_large_residual(
    clean: pd.DataFrame, readings: pd.DataFrame, truth_outliers: pd.DataFrame
) -> None:
    z = clean["error"] / clean["sigma"]
    # Among ~20,000 normal errors |z| > 5.5 has probability 4e-8 each: any such residual must be
    # a flagged outlier, and removing the flagged offset leaves an ordinary error.
    large = z.abs() > 5.5
    assert large.sum() >= 10  # the offsets (SD 1) are several sigma_i (about 0.2) for many
    assert clean.loc[large, "outlier"].all()
    flagged = clean[clean["outlier"]]
    offsets = truth_outliers.set_index(["event_id", "station_id"])["offset"]
    off = offsets.loc[list(zip(flagged["event_id"], flagged["station_id"], strict=True))]
    assert np.all(np.abs((flagged["error"] - off.to_numpy()) / flagged["sigma"]) < 5.5)
    share = truth_outliers["detected"].sum() / readings["detected"].sum()
    assert 0.005 <= share <= 0.015  # about 1 % of the readings (the brief)
    assert set(truth_outliers["station_id"]) <= set(readings["station_id"])


def test_correlated_pairs_show_their_correlation(clean: pd.DataFrame) -> None:
    pairs = pd.read_csv(demo_truth_paths().pairs, dtype=str, keep_default_na=False)
    assert sorted(pairs["rho"].astype(float)) == [0.5, 0.6]
    ok = clean[(clean["margin"] >= 2.5) & ~clean["outlier"]].set_index(["event_id", "station_id"])
    for sid1, sid2, rho in zip(
        pairs["station_id_1"], pairs["station_id_2"], pairs["rho"].astype(float), strict=True
    ):
        e1 = ok.xs(sid1, level="station_id")["error"]
        e2 = ok.xs(sid2, level="station_id")["error"]
        common = e1.index.intersection(e2.index)
        n = len(common)
        assert n >= 60
        r = np.corrcoef(e1.loc[common], e2.loc[common])[0, 1]
        # Fisher's z: atanh(r) ~ N(atanh(rho), 1/(n - 3)); 3 SE (docs/pairs.md, from memory).
        assert abs(np.arctanh(r) - np.arctanh(rho)) < 3.0 / np.sqrt(n - 3), r
        # ... and far from independence.
        assert np.arctanh(r) > 3.0 / np.sqrt(n - 3)


def test_bias_step_is_near_the_stated_size(
    clean: pd.DataFrame,
    readings: pd.DataFrame,
    truth_steps: pd.DataFrame,
    station_epochs: pd.DataFrame,
) -> None:
    assert len(truth_steps) == 1
    step = truth_steps.iloc[0]
    assert step["step"] == pytest.approx(0.3)
    assert step["bias_after"] - step["bias_before"] == pytest.approx(0.3, abs=2e-4)
    assert step["time"].month in (6, 7)  # mid-year
    sta = clean[
        (clean["station_id"] == step["station_id"]) & (clean["margin"] >= 3.0) & ~clean["outlier"]
    ]
    raw = sta["magnitude"] - sta["M"] - step["bias_before"]
    after = sta["time"] >= step["time"]
    d = raw[after].mean() - raw[~after].mean()
    sigma = sta["sigma"].iloc[0]
    se = sigma * np.sqrt(1.0 / after.sum() + 1.0 / (~after).sum())
    assert abs(d - 0.3) < 3.0 * se, (d, se)
    # The metadata show the instrument change: two epochs meeting at the step time.
    epochs = station_epochs[station_epochs["station_id"] == step["station_id"]]
    assert len(epochs) == 2
    assert epochs["end"].iloc[0] == step["time"] == epochs["start"].iloc[1]


def test_clipped_readings_are_large_events_at_close_stations(
    readings: pd.DataFrame, truth_events: pd.DataFrame, truth_stations: pd.DataFrame
) -> None:
    clip = readings[readings["clipped"]]
    assert 1 <= len(clip) <= 20  # "a few"
    m_true = truth_events.loc[clip["event_id"], "magnitude"]
    assert (m_true >= truth_events["magnitude"].quantile(0.99)).all()
    assert (clip["hypocentral_distance_km"] <= 100.0).all()
    # Stored at the sensor's clip level (4 significant digits each side).
    level = truth_stations.loc[clip["station_id"], "clip_amplitude_nm"].to_numpy()
    assert np.allclose(clip["amplitude"].to_numpy(), level, rtol=1e-3)


def test_new_station_has_no_rows_before_it_opens(
    readings: pd.DataFrame, station_epochs: pd.DataFrame, truth_stations: pd.DataFrame
) -> None:
    opened = truth_stations["notes"].str.contains("installed 2025")
    assert opened.sum() == 1
    sid = opened[opened].index[0]
    start = station_epochs.loc[station_epochs["station_id"] == sid, "start"].min()
    assert start.year == 2025
    rows = readings[readings["station_id"] == sid]
    assert len(rows) > 0
    assert (rows["time"] >= start).all()


# -- names and codes -------------------------------------------------------------------------

# Real place names (especially of the ocean around the invented box and of regions with
# seismic networks), agencies and people that must not appear in the invented files.
REAL_PLACES = (
    "Atlantic",
    "Pacific",
    "Antarctic",
    "Tristan",
    "Gough",
    "Falkland",
    "Malvinas",
    "Georgia",
    "Sandwich",
    "Bouvet",
    "Ascension",
    "Helena",
    "Argentina",
    "Chile",
    "Brazil",
    "Uruguay",
    "Africa",
    "America",
    "Patagonia",
    "Cape Town",
    "California",
    "Nevada",
    "Utah",
    "Yellowstone",
    "Alaska",
    "Hawaii",
    "Japan",
    "Iceland",
    "Italy",
    "Greece",
    "Azores",
)
REAL_AGENCIES_AND_PEOPLE = (
    "USGS",
    "EMSC",
    "GFZ",
    "GEOFON",
    "IRIS",
    "NEIC",
    "ORFEUS",
    "Gutenberg",
    "Richter",
    "Omori",
    "Utsu",
)


def _demo_texts(suffixes: tuple[str, ...]) -> dict[str, str]:
    return {
        p.name: p.read_text(encoding="utf-8")
        for p in sorted(SAMPLE_DIR.iterdir())
        if p.suffix in suffixes
    }


def _hits(names: tuple[str, ...], texts: dict[str, str]) -> list[tuple[str, str]]:
    """(name, file) for every name found as a whole word, ignoring case.

    A fast substring test on the lower-cased text picks the candidates; a word-boundary
    regular expression confirms them (so 'Utah' does not match inside another word).
    """
    found = set()
    for file, text in texts.items():
        lower = text.lower()
        for name in names:
            if name.lower() in lower and re.search(rf"\b{re.escape(name)}\b", text, re.I):
                found.add((name, file))
    return sorted(found)


def test_no_real_place_name_in_any_demo_file() -> None:
    texts = _demo_texts((".csv", ".xml", ".md", ".py"))
    assert len(texts) >= 12  # eight data files, README, three modules
    assert _hits(REAL_PLACES, texts) == []
    # The check itself finds a name when one is there.
    assert _hits(REAL_PLACES, {"probe": "near Tristan da Cunha"}) == [("Tristan", "probe")]


def test_no_agency_or_person_name_in_the_data_files() -> None:
    assert _hits(REAL_AGENCIES_AND_PEOPLE, _demo_texts((".csv", ".xml"))) == []


def test_every_code_in_the_data_is_in_the_truth_table(
    readings: pd.DataFrame,
    truth_stations: pd.DataFrame,
    station_epochs: pd.DataFrame,
    december: Catalog,
) -> None:
    from stations.schema import normalise_station_id

    truth = set(truth_stations.index)
    assert set(readings["station_id"]) == truth
    assert set(station_epochs["station_id"]) == truth
    assert {s.split(".")[0] for s in truth} == {"QV", "QS", "QT"}
    for sid in truth:
        net, sta, loc = sid.split(".")
        assert normalise_station_id(net, sta, loc) == sid  # FDSN source identifier rules
        assert 3 <= len(sta) <= 5
    in_xml = {
        f"{a.waveform_id.network_code}.{a.waveform_id.station_code}."
        f"{a.waveform_id.location_code or ''}"
        for ev in december
        for a in ev.amplitudes
    }
    assert in_xml <= truth


# -- QuakeML -----------------------------------------------------------------------------------


def test_quakeml_holds_the_december_events_with_their_station_magnitudes(
    december: Catalog, readings: pd.DataFrame
) -> None:
    dec = readings[readings["origin_time"].str.startswith("2025-12") & readings["detected"]]
    by_event = {k: g for k, g in dec.groupby("event_id")}
    assert len(december) == len(by_event) > 100
    n_zero_weight = 0
    for event in december:
        ev_id = str(event.resource_id).rsplit("/", 1)[1]
        rows = by_event[ev_id].set_index("station_id")
        origin = event.preferred_origin()
        first = rows.iloc[0]
        assert str(origin.time).replace("000Z", "Z") == first["origin_time"]
        assert origin.latitude == first["event_latitude"]
        assert origin.depth == pytest.approx(first["event_depth"] * 1000.0)
        assert len(event.station_magnitudes) == len(event.amplitudes) == len(rows)
        amps = {str(a.resource_id): a for a in event.amplitudes}
        for sm in event.station_magnitudes:
            w = sm.waveform_id
            sid = f"{w.network_code}.{w.station_code}.{w.location_code or ''}"
            assert sm.mag == rows.loc[sid, "magnitude"]
            amp = amps[str(sm.amplitude_id)]
            assert amp.unit == "m"
            assert amp.generic_amplitude * 1e9 == pytest.approx(rows.loc[sid, "amplitude"])
            assert amp.period == rows.loc[sid, "period"]
        mag = event.preferred_magnitude()
        assert mag.magnitude_type == "ML"
        sms = {str(sm.resource_id): sm for sm in event.station_magnitudes}
        used = []
        for c in mag.station_magnitude_contributions:
            sm = sms[str(c.station_magnitude_id)]
            assert c.residual == pytest.approx(sm.mag - mag.mag, abs=1e-9)
            w = sm.waveform_id
            clipped = rows.loc[f"{w.network_code}.{w.station_code}.{w.location_code or ''}"]
            assert c.weight == (0.0 if clipped["clipped"] else 1.0)
            n_zero_weight += c.weight == 0.0
            if c.weight == 1.0:
                used.append(sm.mag)
        # The network magnitude is the plain mean of the weight-1 station magnitudes (3 dec.).
        assert mag.mag == pytest.approx(np.mean(used), abs=5e-4)
        assert mag.station_count == len(used)
    assert n_zero_weight >= 1  # a clipped reading exercises weight 0


def test_project_csv_reader_takes_every_demo_row(readings: pd.DataFrame) -> None:
    from stations.readers.csv import read_csv

    result = read_csv(demo_csv_path())
    assert len(result.rejected) == 0
    assert len(result.records) == len(readings)
    assert result.records["detected"].sum() == readings["detected"].sum()


def test_project_quakeml_reader_takes_every_station_magnitude_and_weight(
    readings: pd.DataFrame,
) -> None:
    from stations.readers.quakeml import read_quakeml

    result = read_quakeml(demo_quakeml_path())
    dec = readings[readings["origin_time"].str.startswith("2025-12") & readings["detected"]]
    assert len(result.rejected) == 0
    assert len(result.records) == len(dec)
    rec = result.records
    # Event ids are the last segment of the QuakeML publicIDs: the CSV event id.
    rec_key = rec["event_id"] + " " + rec["station_id"]
    csv_key = dec["event_id"] + " " + dec["station_id"]
    merged = pd.DataFrame({"key": rec_key, "amp": rec["amplitude"], "w": rec["source_weight"]})
    merged = merged.merge(
        pd.DataFrame({"key": csv_key, "amp_csv": dec["amplitude"], "clip": dec["clipped"]}),
        on="key",
        validate="one_to_one",
    )
    assert len(merged) == len(dec)
    assert np.allclose(merged["amp"], merged["amp_csv"], rtol=1e-12)  # m in the file, nm here
    assert (merged["w"] == np.where(merged["clip"], 0.0, 1.0)).all()
