"""Validity domains, the out-of-domain policy, units and vectorization of the formulas."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stations.errors import ConfigError, DomainError, UnitError
from stations.formulas import (
    BJ84,
    GR56_Q,
    HB87_MM,
    OutOfDomainWarning,
    convert_amplitude,
    evaluate_mb,
    evaluate_ml,
    evaluate_ms_20,
    mb,
    mb_bb,
    mb_lg,
    ml,
    ms_20,
    ms_bb,
    mw,
)
from stations.formulas.units import VELOCITY_UNITS, WOOD_ANDERSON_UNITS


# -- units -------------------------------------------------------------------------------------
def test_wood_anderson_millimetres_use_magnification_2080() -> None:
    """IASPEI standard (verified): 1 mm on a Wood-Anderson record = 1e6/2080 nm."""
    nm = convert_amplitude(1.0, "mm_wa", formula="ML", accepted=WOOD_ANDERSON_UNITS)
    assert float(nm) == pytest.approx(1.0e6 / 2080.0, rel=1e-15)
    assert float(ml(1.0, 100.0, unit="mm_wa")) == pytest.approx(float(ml(1e6 / 2080, 100.0)))


def test_micrometres_are_a_factor_1000_explicitly() -> None:
    assert float(ml(1.0, 50.0, unit="um")) == pytest.approx(float(ml(1000.0, 50.0)), abs=1e-12)
    assert float(mb_bb(1.0, 50.0, 0.0, unit="um/s")) == pytest.approx(
        float(mb_bb(1000.0, 50.0, 0.0)), abs=1e-12
    )


@pytest.mark.parametrize("unit", [u.value for u in VELOCITY_UNITS])
def test_velocity_unit_for_ml_is_a_unit_error(unit: str) -> None:
    with pytest.raises(UnitError, match=r"ML needs a Wood-Anderson displacement.*velocity"):
        ml(1.0, 100.0, unit=unit)


@pytest.mark.parametrize("unit", ["nm", "um", "mm_wa"])
@pytest.mark.parametrize("formula", [mb_bb, ms_bb], ids=["mB_BB", "Ms_BB"])
def test_displacement_unit_for_velocity_scales_is_a_unit_error(formula, unit: str) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(UnitError, match="needs a ground velocity"):
        formula(1000.0, 50.0, 10.0, unit=unit)


def test_wood_anderson_reading_for_mb_is_a_unit_error() -> None:
    with pytest.raises(UnitError, match="a Wood-Anderson reading belongs to ML"):
        mb(1.0, 1.0, 50.0, 0.0, unit="mm_wa")
    with pytest.raises(UnitError, match="mb needs a ground displacement"):
        mb(1.0, 1.0, 50.0, 0.0, unit="nm/s")


def test_unknown_unit_lists_the_allowed_ones() -> None:
    with pytest.raises(UnitError, match=r"unknown amplitude unit 'mm'; use one of nm, um, mm_wa"):
        ml(1.0, 100.0, unit="mm")


# -- policy ------------------------------------------------------------------------------------
def test_out_of_domain_raises_with_index_and_reason() -> None:
    """IASPEI ML: R typically < 1000 km (verified); 1200 km is out of domain."""
    with pytest.raises(DomainError) as info:
        ml([1000.0, 1000.0], [100.0, 1200.0])
    text = str(info.value)
    assert "ML IASPEI-2013 HB87: 1 of 2 inputs" in text
    assert "first at index 1: hypocentral distance 1200 km is above 1000 km" in text
    assert "policy='nan'" in text


def test_policy_nan_warns_and_blanks_only_the_bad_inputs() -> None:
    with pytest.warns(OutOfDomainWarning, match="1 of 3 inputs set to NaN"):
        out = mb([100.0] * 3, [1.0, 1.0, 5.0], [50.0, 50.0, 50.0], [0.0, 0.0, 0.0], policy="nan")
    assert out[0] == pytest.approx(5.7, abs=1e-12)
    assert out[1] == pytest.approx(5.7, abs=1e-12)
    assert np.isnan(out[2])  # T = 5 s is not below 3.0 s (ISC-amp, verified)


def test_policy_compute_keeps_out_of_domain_values_silently() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = ms_20(1000.0, 25.0, 50.0, 10.0, policy="compute")  # T outside 18-22 s
    assert float(out) == pytest.approx(np.log10(1000.0 / 25.0) + 1.66 * np.log10(50.0) + 0.3)


def test_policy_compute_warns_for_values_it_cannot_compute() -> None:
    with pytest.warns(OutOfDomainWarning, match="cannot be computed"):
        out = mb([100.0, 100.0], 1.0, [50.0, 120.0], 0.0, policy="compute")
    assert out[0] == pytest.approx(5.7)
    assert np.isnan(out[1])  # no Q beyond 109 deg: nothing to extrapolate from


def test_unknown_policy_is_a_config_error() -> None:
    with pytest.raises(ConfigError, match=r"must be one of raise, nan, compute\. Got 'clip'"):
        ml(1.0, 10.0, policy="clip")  # type: ignore[arg-type]


# -- domains -----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("distance", "period", "depth", "fragment", "computable"),
    [
        (15.0, 1.0, 0.0, "distance 15 deg is below 16 deg (the GR56-Q table", False),
        (110.0, 1.0, 0.0, "distance 110 deg is above 109 deg", False),
        (18.0, 1.0, 0.0, "distance 18 deg is below 20 deg (IASPEI 2013", True),
        (105.0, 1.0, 0.0, "distance 105 deg is above 100 deg", True),
        (50.0, 3.0, 0.0, "period 3 s is not below 3 s", True),
        (50.0, 1.0, 600.0, "depth 600 km is above 500 km", False),
        (
            50.0,
            1.0,
            -1.5,
            "depth -1.5 km is below 0 km (above the GR56-Q table; Q taken at 0",
            True,
        ),
        (50.0, 1.0, np.nan, "event depth is missing", False),
        (50.0, np.nan, 0.0, "period is missing", False),
        (50.0, -1.0, 0.0, "period -1 s is not > 0", False),
    ],
)
def test_mb_domain_reasons(
    distance: float, period: float, depth: float, fragment: str, computable: bool
) -> None:
    """mb: 20-100 deg, T < 3 s (ISC-amp, verified); Q only inside its grid (16-109, 0-500)."""
    ev = evaluate_mb(100.0, period, distance, depth)
    assert fragment in str(ev.reason)
    assert bool(ev.computable) is computable
    assert bool(np.isnan(ev.magnitude)) is (not computable)


def test_mb_above_sea_level_takes_q_at_zero_depth() -> None:
    ev = evaluate_mb(100.0, 1.0, 50.0, -2.0)
    assert float(ev.magnitude) == pytest.approx(5.7)
    assert not bool(ev.in_domain)


@pytest.mark.parametrize(
    ("period", "distance", "depth", "fragment"),
    [
        (17.0, 50.0, 10.0, "period 17 s is below 18 s"),
        (23.0, 50.0, 10.0, "period 23 s is above 22 s"),
        (20.0, 19.0, 10.0, "distance 19 deg is below 20 deg"),
        (20.0, 161.0, 10.0, "distance 161 deg is above 160 deg"),
        (20.0, 50.0, 60.0, "depth 60 km is not below 60 km"),
        (20.0, 50.0, np.nan, "event depth unknown (Ms_20 requires depth < 60 km)"),
    ],
)
def test_ms_20_domain(period: float, distance: float, depth: float, fragment: str) -> None:
    """Ms_20: T 18-22 s, 20-160 deg (IASPEI 2005, verified); depth < 60 km (H&O 2010)."""
    ev = evaluate_ms_20(1000.0, period, distance, depth)
    assert fragment in str(ev.reason)
    assert bool(ev.computable)  # all of these can be computed with a flag


def test_ms_bb_period_range_is_a_parameter() -> None:
    """H&O 2010 (verified) 2-60 s is the default; the 2013 3-60 s (from memory) can be set."""
    assert np.isfinite(ms_bb(500.0, 10.0, 10.0, period_s=2.5))
    with pytest.raises(DomainError, match=r"period 2\.5 s is below 3 s"):
        ms_bb(500.0, 10.0, 10.0, period_s=2.5, period_range_s=(3.0, 60.0))
    with pytest.raises(DomainError, match=r"distance 1\.5 deg is below 2 deg"):
        ms_bb(500.0, 1.5, 10.0)


def test_mb_bb_period_checked_only_when_given() -> None:
    assert np.isfinite(mb_bb(1000.0, 60.0, 0.0))
    with pytest.raises(DomainError, match="period 40 s is not below 30 s"):
        mb_bb(1000.0, 60.0, 0.0, period_s=40.0)


@pytest.mark.parametrize(
    ("correction", "r_km", "fragment"),
    [
        (HB87_MM, 5.0, "hypocentral distance 5 km is below 10 km"),
        (HB87_MM, 750.0, "hypocentral distance 750 km is above 700 km"),
        (BJ84, 450.0, "hypocentral distance 450 km is above 400 km"),
    ],
)
def test_ml_correction_ranges(correction, r_km: float, fragment: str) -> None:  # type: ignore[no-untyped-def]
    """HB87 calibration 10-700 km (abstract, verified); BJ84 0-400 km (from memory)."""
    ev = evaluate_ml(1000.0, r_km, correction=correction)
    assert fragment in str(ev.reason)
    assert bool(ev.computable)


def test_ml_nonpositive_inputs_are_not_computable() -> None:
    ev = evaluate_ml([0.0, 100.0, 100.0], [50.0, 0.0, np.nan])
    assert list(ev.computable) == [False, False, False]
    assert "amplitude 0 nm is not > 0" in ev.reason[0]
    assert "hypocentral distance 0 km is not > 0" in ev.reason[1]
    assert ev.reason[2] == "hypocentral distance is missing"
    assert np.all(np.isnan(ev.magnitude))


def test_mb_lg_needs_a_valid_gamma() -> None:
    with pytest.raises(ConfigError, match="gamma_per_km"):
        mb_lg(100.0, 300.0, gamma_per_km=-0.1)


def test_mw_rejects_non_positive_moment_and_unknown_form() -> None:
    with pytest.raises(DomainError, match="seismic moment 0 N·m is not > 0"):
        mw(0.0)
    with pytest.raises(ConfigError, match="IASPEI-2013, HK79"):
        mw(1e17, form="HK80")  # type: ignore[arg-type]


# -- vectorization and algebra ----------------------------------------------------------------
def test_scalars_give_zero_dimensional_arrays_and_arrays_broadcast() -> None:
    assert ml(100.0, 10.0).shape == ()
    grid = ml(np.array([[10.0], [100.0]]), np.array([10.0, 20.0, 40.0]))
    assert grid.shape == (2, 3)
    np.testing.assert_allclose(grid[1] - grid[0], 1.0, atol=1e-12)


@settings(max_examples=60, deadline=None)
@given(
    amplitude=st.floats(1e-3, 1e7),
    factor=st.floats(1e-2, 1e2),
    r_km=st.floats(1.0, 1000.0),
)
def test_ml_is_log_linear_in_amplitude(amplitude: float, factor: float, r_km: float) -> None:
    """ML(kA, R) - ML(A, R) = log10 k for every curve (Richter's definition)."""
    for correction in (None, HB87_MM):
        kwargs = {} if correction is None else {"correction": correction, "policy": "compute"}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OutOfDomainWarning)
            gap = ml(amplitude * factor, r_km, **kwargs) - ml(amplitude, r_km, **kwargs)
        assert float(gap) == pytest.approx(np.log10(factor), abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(distance=st.floats(16.0, 109.0), depth=st.floats(0.0, 500.0))
def test_q_interpolation_stays_within_its_cell(distance: float, depth: float) -> None:
    """Bilinear interpolation: Q lies between the four surrounding grid values."""
    d, h, q = GR56_Q.distance_deg, GR56_Q.depth_km, GR56_Q.q
    i = min(int(np.searchsorted(d, distance, side="right")) - 1, d.size - 2)
    k = min(int(np.searchsorted(h, depth, side="right")) - 1, h.size - 2)
    cell = q[k : k + 2, i : i + 2]
    value = float(GR56_Q(distance, depth))
    assert cell.min() - 1e-12 <= value <= cell.max() + 1e-12
