"""The steps both station fitters share (fusion/model/fit_steps.py).

Check values are hand arithmetic on the published formulas named in each test.
"""

from __future__ import annotations

import numpy as np
import pytest

from fusion.model.anchors import AnchorKind
from fusion.model.eb_priors import EBPrior
from fusion.model.fit_steps import (
    ConvergenceTracker,
    Extrapolation,
    anchor_level,
    effective_dof,
    moderated_variance,
    raw_variance,
    refresh_due,
    student_t_weight,
)


def test_student_t_weight_is_capped_only_when_asked() -> None:
    # ω = (ν + 1)/(ν + u²) (Lange, Little & Taylor 1989, the t-model EM weight), ν = 4:
    # u² = 0 -> 5/4, u² = 1 -> 1, u² = 9 -> 5/13 (hand arithmetic).
    u2 = np.array([0.0, 1.0, 9.0])
    np.testing.assert_allclose(student_t_weight(u2, 4.0), [1.25, 1.0, 5.0 / 13.0], rtol=1e-15)
    np.testing.assert_allclose(
        student_t_weight(u2, 4.0, cap_at_one=True), [1.0, 1.0, 5.0 / 13.0], rtol=1e-15
    )
    np.testing.assert_array_equal(u2, [0.0, 1.0, 9.0])  # the input is left alone by default


def test_event_estimate_and_reml_fit_share_the_student_t_weight() -> None:
    import fusion.model.reml_em as reml_em
    import fusion.network.network_magnitude as network_magnitude

    assert reml_em.student_t_weight is student_t_weight
    assert network_magnitude.student_t_weight is student_t_weight


def test_moderated_variance_is_smyths_posterior_variance() -> None:
    # σ² = (d0 s0² + Σ terms)/(d0 + Σγ) (Smyth 2004, eq. for s̃²): d0 = 4, s0² = 0.04,
    # terms 0.3 and 0.1 over Σγ = 10 -> (0.16 + 0.4)/14 = 0.04.
    prior = EBPrior(d0=4.0, s0_2=0.04, tau_b2=1.0)
    out = moderated_variance(prior, (np.array([0.3]), np.array([0.1])), np.array([10.0]))
    np.testing.assert_allclose(out, [0.56 / 14.0], rtol=1e-14)


def test_moderated_variance_keeps_stations_outside_the_fit() -> None:
    prior = EBPrior(d0=4.0, s0_2=0.04, tau_b2=1.0)
    previous = np.array([0.5, 0.7])
    out = moderated_variance(
        prior,
        (np.array([0.3, 0.3]),),
        np.array([10.0, 10.0]),
        where=np.array([True, False]),
        previous=previous,
    )
    np.testing.assert_allclose(out, [0.46 / 14.0, 0.7], rtol=1e-14)


def test_moderated_variance_with_infinite_prior_dof_is_the_prior() -> None:
    prior = EBPrior(d0=np.inf, s0_2=0.04, tau_b2=1.0)
    out = moderated_variance(prior, (np.array([5.0, 5.0]),), np.array([1.0, 2.0]))
    np.testing.assert_array_equal(out, [0.04, 0.04])


def test_raw_variance_is_nan_without_degrees_of_freedom() -> None:
    dof = effective_dof(np.array([10.0, 2.0]), np.array([2.0, 2.0]))  # 10 − 2, 2 − 2
    np.testing.assert_array_equal(dof, [8.0, 0.0])
    s2 = raw_variance(np.array([0.8, 0.3]), dof)
    assert s2[0] == pytest.approx(0.1)
    assert np.isnan(s2[1])


def test_anchor_level_median_and_reference_weights() -> None:
    bias = np.array([0.1, 0.3, -0.2, 5.0])
    weight = np.array([0.5, 0.25, 0.25, 0.0])
    assert anchor_level(AnchorKind.REFERENCE_SET, weight, bias, 9.0) == pytest.approx(
        0.05 + 0.075 - 0.05
    )
    assert anchor_level(AnchorKind.MEDIAN, weight, bias, 9.0) == pytest.approx(0.1)
    assert anchor_level(AnchorKind.MEDIAN, np.zeros(4), bias, 9.0) == 9.0


def test_prior_refresh_after_second_iteration_then_every_eb_every() -> None:
    due = [it for it in range(25) if refresh_due(it, 10)]
    assert due == [1, 9, 19]
    assert not any(refresh_due(it, 0) for it in range(25))


def test_extrapolation_waits_for_three_iterates_and_a_slow_rate() -> None:
    tracker = ConvergenceTracker()
    ex = Extrapolation(tracker, enabled=True)
    theta = [np.array([1.0]), np.array([0.5]), np.array([0.3])]
    assert ex.after_step(0.5, theta[0], 0.9) is None
    assert ex.after_step(0.2, theta[1], 0.9) is None
    assert ex.after_step(0.2, theta[2], 0.1) is None  # fast rate: plain EM is fine
    jumped = ex.after_step(0.1, np.array([0.2]), 0.9)
    assert jumped is not None and ex.theta == []


def test_numerical_fit_module_holds_no_mode_orchestration() -> None:
    # The choice of non-detection mode and the threshold rounds are orchestration; the censored
    # fit module keeps the numerics only (issue 12 item 5).
    import fusion.model.censored_fit as censored_fit
    import fusion.model.nondetection_modes as nondetection_modes

    assert not hasattr(censored_fit, "refit_with_nondetections")
    assert not hasattr(censored_fit, "NondetectionMode")
    assert nondetection_modes.refit_with_nondetections.__module__ == nondetection_modes.__name__
