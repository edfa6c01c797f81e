"""What the duty analyst reads: strict JSON, the recorded value, one sign convention, one interval
level, the dry run's order, ``diff`` without a newer candidate, and output paths.

Data: the first quarter of the invented demo network (``sample_events/``), built once per module
by the ``learned_store`` fixture (``tests/cli/conftest.py``): ``v1`` adopted and fused, ``v2`` a
newer candidate. Outside checks: JSON is parsed by Python's ``json.loads`` with a
``parse_constant`` hook that refuses ``NaN``/``Infinity`` (RFC 8259 §6 has no such tokens);
magnitudes and weights are compared with the fused store's own rows and the model tables.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fusion.versions.fused_store import FusedStore
from fusion.versions.model_registry import ModelRegistry
from tests.cli.conftest import (
    ADVISORY_LINE,
    FAST_CONFIG,
    LearnedStore,
    copy_store,
    invoke,
    write_config,
)


def _strict(text: str) -> Any:
    """Parse RFC 8259 JSON; ``NaN``, ``Infinity`` and ``-Infinity`` are refused."""

    def refuse(token: str) -> Any:
        raise ValueError(f"not JSON: {token}")

    return json.loads(text, parse_constant=refuse)


def _flag_values(doc: Any, path: str = "$") -> list[tuple[str, Any]]:
    """Every value stored under a key containing ``flags``, with its JSON path."""
    out: list[tuple[str, Any]] = []
    if isinstance(doc, dict):
        for k, v in doc.items():
            if "flags" in str(k):
                out.append((f"{path}.{k}", v))
            out += _flag_values(v, f"{path}.{k}")
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            out += _flag_values(v, f"{path}[{i}]")
    return out


def _events(ls: LearnedStore) -> pd.DataFrame:
    return FusedStore(ls.root).current("ML")


def _event_of(cur: pd.DataFrame, mask: Any) -> str:
    hit = cur[mask]
    assert len(hit), "the demo quarter has no such event"
    return str(hit["event_id"].iloc[0])


# -- strict JSON (case 6) -----------------------------------------------------------------------


def test_every_json_output_and_file_is_strict_json_with_flags_as_lists(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "store")
    cur = _events(ls)
    one = _event_of(cur, cur["n_stations"] == 1)
    nondet = _event_of(cur, cur["n_nondetections_used"] > 0)
    gls = _event_of(cur, cur["method"] == "robust-gls")
    common = ("--store", root, "--config", ls.config)
    outputs = {
        "store": invoke("store", "--json", "--store", root),
        "models": invoke("models", "--json", *common),
        "diff": invoke("diff", "--json", *common),
        "learn": invoke("learn", "--json", *common),
        **{f"event {e}": invoke("event", e, "--json", *common) for e in (one, nondet, gls)},
    }
    for name, res in outputs.items():
        assert res.exit_code == 0, (name, res.stderr)
        doc = _strict(res.stdout)  # raises on NaN / Infinity
        for where, value in _flag_values(doc):
            assert isinstance(value, list), (name, where, value)
    one_doc = _strict(outputs[f"event {one}"].stdout)
    assert one_doc["event"]["flags"] == list(one_doc["flags"])
    assert "single-station" in one_doc["flags"]
    assert one_doc["notes"][0].startswith("one detecting station: the value rests on its reading")
    # Every JSON file magfuse wrote into the store is strict too.
    files = sorted(root.rglob("*.json"))
    assert files
    for path in files:
        _strict(path.read_text(encoding="utf-8"))


# -- the recorded value (case 7) ----------------------------------------------------------------


def test_event_shows_the_recorded_final_value_and_recomputes_only_when_asked(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "store")
    cur = _events(ls)
    eid = _event_of(cur, cur["n_stations"] >= 4)
    row = cur.set_index("event_id").loc[eid]
    assert invoke("finalize", eid, "--store", root).exit_code == 0
    assert invoke("adopt", ls.v2, "--store", root).exit_code == 0  # a different active model
    common = ("--store", root, "--config", ls.config)

    doc = _strict(invoke("event", eid, "--json", *common).stdout)
    assert (doc["status"], doc["model_version"]) == ("final", ls.v1)
    assert doc["magnitude"] == row["magnitude"]
    assert doc["uncertainty"] == row["se"]
    assert "recomputed" not in doc
    text = invoke("event", eid, *common).stdout.splitlines()
    assert text[1].startswith(f"network magnitude  {row['magnitude']:.2f}  SE {row['se']:.3f};")
    assert text[2] == f"status             final, recorded with model {ls.v1}"
    assert not any(line.startswith("recomputed") for line in text)

    again = _strict(invoke("event", eid, "--json", "--recompute", *common).stdout)
    assert (again["status"], again["model_version"]) == ("final", ls.v1)
    assert again["magnitude"] == row["magnitude"]
    assert again["recomputed"]["model_version"] == ls.v2
    assert again["recomputed"]["magnitude"] != row["magnitude"]
    text = invoke("event", eid, "--recompute", *common).stdout.splitlines()
    assert text[3].startswith(f"recomputed now     {again['recomputed']['magnitude']:.2f}  SE ")
    assert text[3].endswith(f"with {ls.v2} (not on record)")


# -- one sign, one meaning per column (case 8) -----------------------------------------------


def test_largest_influence_in_the_summary_is_the_station_rows_value_with_its_sign(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    fs = FusedStore(ls.root)
    cur = _events(ls)
    rows = fs.current_contributions("ML", cur)
    rows = rows[np.isfinite(rows["influence"].to_numpy(float))]
    idx = rows.groupby("event_id")["influence"].apply(lambda s: s.abs().idxmax())
    top = rows.loc[idx.to_numpy()].set_index("event_id")
    ev = cur.set_index("event_id").loc[top.index]
    # Stored event table: signed influence of the station with the largest |influence|.
    np.testing.assert_array_equal(ev["max_influence"].to_numpy(), top["influence"].to_numpy())
    assert (ev["max_influence_station"] == top["station_id"]).all()
    negative = top.index[top["influence"].to_numpy() < 0]
    assert len(negative)
    eid = str(negative[0])
    station, value = str(top.loc[eid, "station_id"]), float(top.loc[eid, "influence"])
    common = ("--store", ls.root, "--config", ls.config)
    text = invoke("event", eid, *common).stdout.splitlines()
    summary = next(line for line in text if line.startswith("stations "))
    assert summary.endswith(f"largest influence {value:+.3f} ({station})")
    row = next(line for line in text if line.startswith(station + " "))
    assert f" {value:+.3f} " in row
    assert any(
        line.startswith("influence = network magnitude with the station minus") for line in text
    )
    doc = _strict(invoke("event", eid, "--json", *common).stdout)
    assert doc["event"]["max_influence"] == value
    assert doc["conventions"]["influence"].startswith("network magnitude with the station")
    # The event page states the same convention and shows the same signed value.
    page_path = tmp_path / "event.html"
    assert invoke("event", eid, "--html", page_path, *common).exit_code == 0
    page = page_path.read_text(encoding="utf-8")
    assert "influence = network magnitude with the station minus" in page
    assert f">{value:+.3f}<" in page


def test_corrected_column_of_a_non_detection_is_its_corrected_threshold(
    learned_store: LearnedStore,
) -> None:
    ls = learned_store
    cur = _events(ls)
    eid = _event_of(cur, cur["n_nondetections_used"] > 0)
    common = ("--store", ls.root, "--config", ls.config)
    doc = _strict(invoke("event", eid, "--json", *common).stdout)
    nd = [c for c in doc["contributions"] if not c["detected"]]
    assert nd
    # Pick a non-detection whose correction changes the printed value.
    c = next(c for c in nd if round(c["correction"], 2) != 0.0)
    assert c["corrected_threshold"] == c["threshold"] + c["correction"]
    text = invoke("event", eid, *common).stdout.splitlines()
    line = next(x for x in text if x.startswith(c["station_id"] + " "))
    cells = line.split()
    assert cells[3:5] == ["<", f"{c['threshold'] + c['correction']:.2f}"]
    assert f"(noise threshold {c['threshold']:.2f})" in line
    # The event figure draws non-detections at the same corrected threshold.
    from fusion.report.event_figure import event_picture
    from fusion.settings import load_config
    from fusion.workflows.event_view import explain_event
    from stations.store import StationMagnitudeStore

    st = StationMagnitudeStore.open(ls.root)
    ex = explain_event(st, ModelRegistry(ls.root), load_config(ls.config), eid)
    pic = event_picture(ex.estimate)
    k = int(np.flatnonzero(pic.station_id == c["station_id"])[0])
    assert pic.threshold[k] + pic.correction[k] == c["corrected_threshold"]


# -- the dry run (case 10) ----------------------------------------------------------------------


def test_diff_lists_the_stations_outside_the_adoption_policy_first(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    first = _strict(invoke("diff", ls.v2, "--json", "--store", ls.root).stdout)
    st = pd.DataFrame(first["stations"])
    bias = st["bias_change"].abs().fillna(0.0).to_numpy(float)
    share = st["share_change"].abs().to_numpy(float)
    order = np.argsort(-bias)
    breaker = str(st["station_id"].iloc[order[0]])
    assert breaker != str(st["station_id"].iloc[int(np.argmax(share))])
    limit = float((bias[order[0]] + bias[order[1]]) / 2.0)  # only `breaker` moves more
    config = write_config(
        tmp_path / "tight.toml",
        FAST_CONFIG + f"[nightly]\nmax_bias_change = {limit!r}\nmax_weight_share_change = 0.9\n",
    )
    common = ("--store", ls.root, "--config", config)
    doc = _strict(invoke("diff", ls.v2, "--json", *common).stdout)
    assert doc["stations"][0]["station_id"] == breaker
    assert [s["outside_policy"] for s in doc["stations"]] == [True] + [False] * (
        len(doc["stations"]) - 1
    )
    assert doc["within_policy"] is False
    text = invoke("diff", ls.v2, *common).stdout.splitlines()
    header = next(i for i, line in enumerate(text) if line.startswith("station "))
    assert text[header + 1].startswith(breaker)
    assert "OUTSIDE POLICY" in text[header + 1]


def test_diff_without_a_newer_candidate_says_so_and_compares_nothing(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    res = invoke("diff", "--json", "--store", ls.root, "--config", ls.config)
    assert _strict(res.stdout)["candidate_version"] == ls.v2  # v2 is newer than active v1
    root = copy_store(ls.root, tmp_path / "store")
    assert invoke("adopt", ls.v2, "--store", root).exit_code == 0
    res = invoke("diff", "--store", root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    assert res.stdout == (
        f"no candidate newer than the active version {ls.v2}; run 'magfuse learn' "
        "(or name an older version: magfuse diff VERSION)\n"
    )
    assert res.stderr == ADVISORY_LINE
    # Naming the older version still compares it.
    older = invoke("diff", ls.v1, "--store", root, "--config", ls.config)
    assert older.exit_code == 0
    assert older.stdout.splitlines()[1:3] == [f"  before  {ls.v2}", f"  after   {ls.v1}"]


# -- output paths (case 12) ---------------------------------------------------------------------


def test_output_paths_in_missing_folders_are_created_and_wrong_kinds_fail_first(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "store")
    common = ("--store", root, "--config", ls.config)
    eid = _event_of(_events(ls), _events(ls)["n_stations"] >= 3)
    new = tmp_path / "new"
    cases = [
        (("event", eid, "--html", new / "a" / "e.html"), new / "a" / "e.html", "--html"),
        (("event", eid, "--png", new / "b" / "e.png"), new / "b" / "e.png", "--png"),
        (("export", "stations", "--out", new / "c" / "s.csv"), new / "c" / "s.csv", "--out"),
        (("report", "--out", new / "d" / "r"), new / "d" / "r", "--out"),
    ]
    for args, target, option in cases:
        res = invoke(*args, *common)
        assert res.exit_code == 0, (args, res.stderr)
        assert target.exists()
        folder = target.parent if target.suffix else target
        assert f"created folder {folder} for {option}\n" in res.stderr
    n_versions = len(ModelRegistry(root).versions("ML"))
    a_file = tmp_path / "file.txt"
    a_file.write_text("x")
    wrong = [
        ("event", eid, "--html", tmp_path),
        ("event", eid, "--png", tmp_path),
        ("export", "stations", "--out", tmp_path),
        ("report", "--out", a_file),
        ("learn", "--csv", a_file),
        ("learn", "--csv", a_file / "below"),
    ]
    for args in wrong:
        res = invoke(*args, *common)
        assert (res.exit_code, res.stdout) == (1, ""), args
        assert re.fullmatch(r"Error: [^\n]+\n", res.stderr), (args, res.stderr)
    # learn --csv FILE failed before it saved a candidate.
    assert len(ModelRegistry(root).versions("ML")) == n_versions


# -- one interval level, one wording (case 17) -------------------------------------------------


def test_report_event_text_and_json_name_the_same_interval_level(
    learned_store: LearnedStore, tmp_path: Path
) -> None:
    ls = learned_store
    root = copy_store(ls.root, tmp_path / "store")
    config = write_config(
        tmp_path / "ninety.toml", FAST_CONFIG + "[network]\nconfidence_level = 0.9\n"
    )
    common = ("--store", root, "--config", config)
    assert invoke("fuse", *common).exit_code == 0  # records the intervals at 90 %
    eid = _event_of(_events(ls), _events(ls)["n_stations"] >= 3)
    text = invoke("event", eid, *common).stdout
    assert "90 % interval" in text
    assert not re.search(r"1 ?SE|1σ|1 sigma|68 %|95 %", text)
    doc = _strict(invoke("event", eid, "--json", *common).stdout)
    assert doc["interval"]["name"] == "90 % interval"
    assert doc["interval"]["level"] == 0.9
    assert invoke("event", eid, "--html", tmp_path / "e.html", *common).exit_code == 0
    page = (tmp_path / "e.html").read_text(encoding="utf-8")
    assert "90 % interval" in page and "1σ" not in page
    assert invoke("report", "--out", tmp_path / "report", *common).exit_code == 0
    html = next((tmp_path / "report").glob("*.html")).read_text(encoding="utf-8")
    assert "90 % interval" in html
    # Two columns are intervals of other quantities at a fixed level named in their header (the
    # Fisher-z interval of a pair's error correlation and the likelihood-ratio interval of a
    # change time, both computed at learn time); no magnitude or bias interval uses another level.
    for fixed in ("correlation interval (95 %)", "change between (95 %)", "(95 % interval)"):
        html = html.replace(fixed, "")
    assert not re.search(r"\b(95|68) %", html)
