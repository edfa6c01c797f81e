"""One spelling per flag and method name, each with its meaning; old stored names read as new."""

from __future__ import annotations

import re

import pyarrow as pa
import pytest

from fusion.flags import (
    EVENT_FLAGS,
    METHODS,
    RENAMED,
    ROW_FLAGS,
    STATION_FLAGS,
    upgrade_flags,
    upgrade_methods,
)
from fusion.network.network_magnitude import EstimateMethod, EventFlag, RowFlag
from fusion.report.station_table import StationFlag
from fusion.versions.fused_store import _upgrade_names

#: Lowercase words joined by hyphens: the one style of every flag and method name.
STYLE = re.compile(r"[a-z]+(-[a-z]+)*")


@pytest.mark.parametrize(
    ("names", "table"),
    [
        (EstimateMethod, METHODS),
        (EventFlag, EVENT_FLAGS),
        (RowFlag, ROW_FLAGS),
        (StationFlag, STATION_FLAGS),
    ],
)
def test_every_flag_has_one_style_and_a_meaning(names: type, table: dict[str, str]) -> None:
    values = [str(v) for v in names]  # type: ignore[attr-defined]
    assert sorted(values) == sorted(table)
    for v in values:
        assert STYLE.fullmatch(v), v
        assert table[v].strip(), v


def test_no_flag_has_two_spellings() -> None:
    """'non-detection' (a station saw nothing) and the event that has no usable detection are
    different words; 'correlated' is spelled 'correlated-pair' everywhere."""
    every = {*METHODS, *EVENT_FLAGS, *ROW_FLAGS, *STATION_FLAGS}
    assert "no-detection" not in every and "correlated" not in every
    assert not any("_" in v for v in every)
    assert not set(RENAMED) & every  # old names are only ever read, never written
    assert set(RENAMED.values()) <= every


def test_censored_method_does_not_read_as_local_magnitude() -> None:
    assert "censored-likelihood" in METHODS
    assert not any(re.search(r"(^|[-_])ml($|[-_])", v) for v in METHODS)


def test_names_from_older_stores_read_as_todays() -> None:
    methods = pa.array(["censored_ml", "gls", "robust_gls", "single_station", None])
    assert upgrade_methods(methods).to_pylist() == [
        "censored-likelihood",
        "gls",
        "robust-gls",
        "single-station",
        None,
    ]
    flags = pa.array(["no-detection", "outlier;no-detection", "", "censoring-used", None])
    assert upgrade_flags(flags).to_pylist() == [
        "no-usable-detection",
        "outlier;no-usable-detection",
        "",
        "censoring-used",
        None,
    ]
    table = pa.table({"method": methods, "flags": flags, "x": pa.array([1, 2, 3, 4, 5])})
    out = _upgrade_names(table)
    assert out.column("method").to_pylist()[0] == "censored-likelihood"
    assert out.column("flags").to_pylist()[1] == "outlier;no-usable-detection"
    assert out.schema == table.schema


def test_store_written_with_old_names_reads_with_todays(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A fused store holding 'censored_ml', 'robust_gls' and 'no-detection' (written before
    the rename) is read with today's names; the files stay as they are."""
    import dataclasses
    import warnings

    from fusion.model.simulation import SimulationConfig, simulate_network
    from fusion.model.station_model import StationModel
    from fusion.network.network_magnitude import fuse_events
    from fusion.versions.fused_store import FusedStore

    net = simulate_network(SimulationConfig(n_stations=6, n_events=40, pair_rhos=()), seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = StationModel().fit(net.observations)
        fused = fuse_events(net.observations, model.parameters_)
    ev = fused.events.copy()
    ev["method"] = ev["method"].replace({"gls": "censored_ml", "robust-gls": "robust_gls"})
    ev.loc[ev.index[0], "flags"] = "outlier;no-detection"
    store = FusedStore(tmp_path)
    store.write_run(dataclasses.replace(fused, events=ev), model_version="ML-old")
    cur = store.current("ML").set_index("event_id")
    assert set(cur["method"]) <= set(METHODS)
    assert "censored-likelihood" in set(cur["method"])
    assert cur.loc[str(ev["event_id"].iloc[0]), "flags"] == "outlier;no-usable-detection"
