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
