"""Benjamini–Hochberg and Benjamini–Yekutieli against statsmodels and published values."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multitest import multipletests

from fusion.model.multiple_testing import FDRMethod, by_divisor, fdr_adjust, fdr_control
from stations.errors import ConfigError
from tests.reference.pairs import (
    BH1995_N_REJECT_BH,
    BH1995_N_REJECT_BONFERRONI,
    BH1995_P,
    BY_DIVISOR_M10,
)

_SM = {"bh": "fdr_bh", "by": "fdr_by"}


def test_by_divisor_m10() -> None:
    # docs/check-values.md §7: Σ_{i≤10} 1/i = 2.928968 (statsmodels docs, verified; computed).
    assert by_divisor(10) == pytest.approx(BY_DIVISOR_M10, abs=1e-6)
    assert by_divisor(1) == 1.0
    assert by_divisor(0) == 0.0


@pytest.mark.parametrize("method", ["bh", "by"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_matches_statsmodels_on_random_families(method: str, seed: int) -> None:
    # Reference: statsmodels.stats.multitest.multipletests(method='fdr_bh' | 'fdr_by').
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.uniform(size=80), rng.uniform(0, 1e-3, size=20)])
    p[::7] = np.round(p[::7], 2)  # ties
    res = fdr_control(p, 0.05, method=method)
    rej, q_sm, _, _ = multipletests(p, alpha=0.05, method=_SM[method])
    np.testing.assert_array_equal(res.reject, rej)
    np.testing.assert_allclose(res.q_value, q_sm, rtol=1e-12, atol=1e-15)
    assert res.n_tests == 100 and res.method is FDRMethod(method)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(0.0, 1.0, allow_nan=False), min_size=1, max_size=40),
    st.sampled_from(["bh", "by"]),
    st.floats(0.001, 0.5),
)
def test_property_statsmodels_agreement(p: list[float], method: str, q: float) -> None:
    # Reference: statsmodels multipletests; equal decisions and adjusted p-values.
    arr = np.asarray(p)
    res = fdr_control(arr, q, method=method)
    rej, q_sm, _, _ = multipletests(arr, alpha=q, method=_SM[method])
    np.testing.assert_allclose(res.q_value, q_sm, rtol=1e-12, atol=1e-15)
    # Decisions can differ only where q-value == q up to rounding (p·m/i vs i·q/m).
    differ = res.reject != rej
    assert np.all(np.isclose(res.q_value[differ], q, rtol=1e-12))


def test_bh1995_worked_example() -> None:
    # Benjamini & Hochberg (1995) §4 example [from memory]: BH rejects 4, Bonferroni 3;
    # cross-checked with statsmodels (verified library).
    p = np.asarray(BH1995_P)
    assert fdr_control(p, 0.05, method="bh").reject.sum() == BH1995_N_REJECT_BH
    assert (p <= 0.05 / p.size).sum() == BH1995_N_REJECT_BONFERRONI
    assert multipletests(p, alpha=0.05, method="fdr_bh")[0].sum() == BH1995_N_REJECT_BH
    # BY is more conservative: never rejects more than BH.
    assert fdr_control(p, 0.05, method="by").reject.sum() <= BH1995_N_REJECT_BH


def test_nan_entries_are_not_part_of_the_family() -> None:
    # Reference: statsmodels on the finite subset (m counts only tested hypotheses).
    p = np.array([0.001, np.nan, 0.02, 0.04, np.nan, 0.5])
    res = fdr_control(p, 0.05)
    finite = ~np.isnan(p)
    _, q_sm, _, _ = multipletests(p[finite], alpha=0.05, method="fdr_bh")
    np.testing.assert_allclose(res.q_value[finite], q_sm)
    assert np.all(np.isnan(res.q_value[~finite])) and not res.reject[~finite].any()
    assert res.n_tests == 4
    assert np.all(np.isnan(fdr_adjust([np.nan, np.nan])))


def test_bad_inputs_raise_typed_errors() -> None:
    with pytest.raises(ConfigError, match="'q' parameter of fdr_control"):
        fdr_control([0.1], 1.5)
    with pytest.raises(ConfigError, match="p-values must lie in"):
        fdr_adjust([0.1, 1.2])
    with pytest.raises(ConfigError, match="'method' parameter"):
        fdr_adjust([0.1], method="holm")
