"""Empirical-Bayes priors (docs/estimator.md §5): Smyth's moderated variances and the bias prior."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from fusion.model.eb_priors import (
    MAD_TO_SD,
    EBPrior,
    fit_bias_prior,
    fit_variance_prior,
    initial_error_variance,
    moderated_variance,
    trigamma_inverse,
)
from tests.reference import estimator as ref


def test_smyth_check_value() -> None:
    """docs/check-values.md §7: d0 = 4, s0² = 0.04, d = 6, s² = 0.09 → 0.07 (Smyth 2004)."""
    got = moderated_variance(ref.SMYTH_S2, ref.SMYTH_D, ref.SMYTH_D0, ref.SMYTH_S0_2)
    assert float(got) == pytest.approx(float(ref.SMYTH_MODERATED), abs=1e-12)


def test_moderated_variance_limits() -> None:
    """d0 = ∞ pins σ̃² = s0²; d = 0 gives s0²; d0 = 0 gives the raw s² (Smyth 2004)."""
    s2 = np.array([0.01, 0.09, np.nan])
    d = np.array([10.0, 3.0, 0.0])
    assert np.allclose(moderated_variance(s2, d, np.inf, 0.04), 0.04)
    out = moderated_variance(s2, d, 0.0, 0.04)
    assert np.allclose(out[:2], s2[:2]) and out[2] == pytest.approx(0.04)


def test_mad_factor_matches_scipy() -> None:
    """1.4826 = 1/Φ⁻¹(3/4) (scipy.stats.median_abs_deviation scale='normal', verified library)."""
    x = np.array([1.0, 2.0, 4.0, 7.0, 11.0])
    mad = np.median(np.abs(x - np.median(x)))
    assert MAD_TO_SD * mad == pytest.approx(stats.median_abs_deviation(x, scale="normal"))


@pytest.mark.parametrize("y", [1e-3, 0.05, 0.7, 3.0, 40.0, 2e4])
def test_trigamma_inverse_round_trip(y: float) -> None:
    """ψ'(trigamma_inverse(x)) = x, with ψ' from scipy.special.polygamma (verified library)."""
    x = float(special.polygamma(1, y))
    got = float(trigamma_inverse(x))
    assert float(special.polygamma(1, got)) == pytest.approx(x, rel=1e-7)
    assert got == pytest.approx(y, rel=1e-6)


def test_variance_prior_recovers_smyth_model() -> None:
    """Smyth's hierarchical model (Smyth 2004 §3): σ_i² ~ d0 s0²/χ²_{d0}, s_i² ~ σ_i² χ²_d/d.

    With 4000 stations the moment estimator recovers d0 = 8 and s0² = 0.05 (over 200 repeated
    draws: mean d̂0 7.99, SD 0.23; mean ŝ0² 0.0501, SD 0.0005; so the bounds are > 4 SD).
    """
    rng = np.random.default_rng(7)
    K, d0, s0_2 = 4000, 8.0, 0.05
    d = rng.integers(6, 60, size=K).astype(float)
    sigma2 = d0 * s0_2 / rng.chisquare(d0, size=K)
    s2 = sigma2 * rng.chisquare(d) / d
    fitted = fit_variance_prior(s2, d)
    assert fitted is not None
    d0_hat, s0_hat = fitted
    assert d0_hat == pytest.approx(d0, abs=1.0)
    assert s0_hat == pytest.approx(s0_2, rel=0.05)


def test_variance_prior_infinite_when_no_spread() -> None:
    """Equal true variances: the spread of log s² is all sampling, so d0 → ∞ (or very large)."""
    rng = np.random.default_rng(3)
    d = np.full(3000, 40.0)
    s2 = 0.04 * rng.chisquare(d) / d
    fitted = fit_variance_prior(s2, d)
    assert fitted is not None
    assert fitted[0] > 200.0
    assert fitted[1] == pytest.approx(0.04, rel=0.02)


def test_variance_prior_needs_dof_five_and_three_stations() -> None:
    """docs/estimator.md §5.1: only stations with d_i >= 5 enter; too few of them keep the prior."""
    assert fit_variance_prior([0.04, 0.05, 0.06], [4.9, 4.0, 10.0]) is None
    assert fit_variance_prior([0.04, 0.05, 0.06], [5.0, 6.0, 10.0]) is not None


def test_bias_prior_undoes_ridge_shrinkage() -> None:
    """τ̂_b² = mean b_data² − mean v recovers τ_b² = 0.04 from ridge-shrunk estimates.

    True b ~ N(0, 0.2²), data estimates b + N(0, v), fitted with a ridge τ_c² = 0.1 (shrunk by
    τ_c²/(τ_c² + v)); the estimator must undo the shrinkage (else it drifts to 0, derived).
    """
    rng = np.random.default_rng(11)
    K = 6000
    b = rng.normal(0.0, 0.2, K)
    v = rng.uniform(0.0005, 0.01, K)
    b_data = b + rng.normal(0.0, np.sqrt(v))
    tau_c = 0.1
    shrunk = b_data * tau_c / (tau_c + v)
    got = fit_bias_prior(shrunk, v, np.full(K, 100.0), current_tau_b2=tau_c)
    assert got == pytest.approx(0.04, rel=0.06)
    naive = fit_bias_prior(shrunk, v, np.full(K, 100.0))  # forgetting the shrinkage
    assert naive is not None and got is not None and naive < got
    assert fit_bias_prior(shrunk[:2], v[:2], np.full(2, 100.0)) is None
    assert fit_bias_prior(shrunk, v, np.full(K, 29.0)) is None  # n_i >= 30 only


def test_initial_error_variance_matches_scipy_mad() -> None:
    """Median over events of (1.4826 MAD_j)², against scipy.stats.median_abs_deviation per event."""
    rng = np.random.default_rng(5)
    counts = rng.integers(3, 9, size=300)
    event = np.repeat(np.arange(300), counts)
    x = rng.normal(0.0, 0.3, size=event.shape[0]) + rng.normal(3.0, 1.0, 300)[event]
    expected = np.median(
        [stats.median_abs_deviation(x[event == j], scale="normal") ** 2 for j in range(300)]
    )
    assert initial_error_variance(event, x, 300) == pytest.approx(expected, rel=1e-12)


def test_ebprior_validation() -> None:
    with pytest.raises(ValueError, match="s0_2"):
        EBPrior(d0=4.0, s0_2=0.0)
    with pytest.raises(ValueError, match="tau_b2"):
        EBPrior(tau_b2=-1.0)
    assert EBPrior(d0=np.inf, tau_b2=np.inf).d0 == np.inf


@pytest.mark.parametrize("module", ["fusion.model.eb_priors", "fusion.model.forgetting"])
def test_docstring_examples(module: str) -> None:
    """The Examples sections run (docs/conventions.md item 18)."""
    import doctest
    import importlib

    result = doctest.testmod(importlib.import_module(module))
    assert result.attempted > 0 and result.failed == 0
