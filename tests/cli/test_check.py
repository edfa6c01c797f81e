"""``magfuse check``: label-free scores of a candidate beside the active model, end to end."""

from __future__ import annotations

import json

from fusion.advisory import ADVISORY
from tests.cli.conftest import LearnedStore, invoke


def test_check_scores_candidate_active_and_corrected_mean_as_strict_json(
    learned_store: LearnedStore,
) -> None:
    ls = learned_store
    res = invoke("check", "--json", "--seeds", "3", "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr

    def refuse(name: str) -> None:
        raise AssertionError(f"non-strict JSON constant {name}")

    payload = json.loads(res.stdout, parse_constant=refuse)
    assert payload["examined"] == ls.v2
    assert payload["active"] == ls.v1
    names = [e["estimator"] for e in payload["split_half"]["estimators"]]
    assert names == [ls.v2, ls.v1, "station-corrected mean"]
    assert all(len(v) == 3 for v in payload["split_half"]["per_seed"].values())
    assert isinstance(payload["worse_than_active"], bool)
    assert ADVISORY in res.stderr


def test_check_text_names_the_active_model_and_the_corrected_mean(
    learned_store: LearnedStore,
) -> None:
    ls = learned_store
    res = invoke("check", ls.v1, "--seeds", "2", "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    assert f"{ls.v1} (active)" in res.stdout
    assert "station-corrected mean" in res.stdout
    assert "split-half agreement" in res.stdout


def test_check_with_one_seed_is_refused_in_one_line(learned_store: LearnedStore) -> None:
    ls = learned_store
    res = invoke("check", "--seeds", "1", "--store", ls.root, "--config", ls.config)
    assert res.exit_code != 0
    assert "Traceback" not in res.stderr + res.stdout


def test_dry_run_shows_split_half_agreement_of_candidate_and_active(
    learned_store: LearnedStore,
) -> None:
    ls = learned_store
    res = invoke("diff", ls.v2, "--json", "--days", "90", "--store", ls.root, "--config", ls.config)
    assert res.exit_code == 0, res.stderr
    payload = json.loads(res.stdout)
    agreement = payload["agreement"]
    assert agreement is not None
    names = [e["estimator"] for e in agreement["split_half"]["estimators"]]
    assert names == [ls.v2, ls.v1, "station-corrected mean"]
    text = invoke("diff", ls.v2, "--days", "90", "--store", ls.root, "--config", ls.config)
    assert "split-half agreement" in text.stdout


def test_candidate_with_worse_agreement_is_outside_the_adoption_policy() -> None:
    import pandas as pd

    from fusion.workflows.dry_run import DryRunReport

    base = dict(
        magnitude_type="ML",
        active_version="a",
        candidate_version="b",
        window_start="",
        window_end="",
        n_events=0,
        stations=pd.DataFrame(columns=["station_id", "share_change", "bias_change"]),
        changes={},
        top_events=pd.DataFrame(),
    )
    worse = {"worse_than_active": True, "reason": "split-half agreement SD worse", "split_half": {}}
    fine = {"worse_than_active": False, "reason": None, "split_half": {}}
    limits = dict(max_weight_share_change=0.1, max_bias_change=0.1)
    ok, reasons = DryRunReport(**base, agreement=worse).within_policy(**limits)  # type: ignore[arg-type]
    assert not ok and reasons == ["split-half agreement SD worse"]
    assert DryRunReport(**base, agreement=fine).within_policy(**limits) == (True, [])  # type: ignore[arg-type]
