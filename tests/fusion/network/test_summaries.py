"""Summaries of an event table (fusion.network.summaries)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from fusion.network.summaries import difference_summary, plain_mean_difference


def test_difference_summary_of_network_minus_plain_mean_by_hand() -> None:
    ev = pd.DataFrame({"magnitude": [1.0, 2.0, np.nan, 3.0], "plain_mean": [1.2, 2.0, 1.0, 2.85]})
    d = plain_mean_difference(ev)
    np.testing.assert_allclose(d[[0, 1, 3]], [-0.2, 0.0, 0.15])
    assert np.isnan(d[2])
    s = difference_summary(d)
    # numpy's default (linear) quantiles of [-0.2, 0.0, 0.15]: 5 % -> -0.18, 95 % -> 0.135.
    assert s["n"] == 3 and s["median"] == 0.0 and s["n_ge_0_1"] == 2
    assert s["q05"] == pytest.approx(-0.18) and s["q95"] == pytest.approx(0.135)
    assert difference_summary(np.array([np.nan])) == {"n": 0}
