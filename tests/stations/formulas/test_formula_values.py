"""Magnitude formulas against outside check values (docs/check-values.md §1-§5, tests/reference)."""

from __future__ import annotations

import doctest

import numpy as np
import pytest

import stations.formulas.batch
import stations.formulas.body
import stations.formulas.local
import stations.formulas.moment
import stations.formulas.regional
import stations.formulas.surface
import stations.formulas.units
from stations.formulas import (
    BJ84,
    GR56_CHART_Q,
    GR56_Q,
    HB87,
    HB87_MM,
    QTable,
    mb,
    mb_bb,
    mb_lg,
    ml,
    ms_20,
    ms_bb,
    mw,
)
from tests.reference import formulas as ref


@pytest.mark.parametrize(("amplitude_nm", "r_km", "expected"), ref.ML_IASPEI)
def test_ml_iaspei_worked_examples(amplitude_nm: float, r_km: float, expected: float) -> None:
    """docs/check-values.md §3 #1-#4: IASPEI ML, A in nm (Wood-Anderson, magnification 1)."""
    assert float(ml(amplitude_nm, r_km)) == pytest.approx(expected, abs=ref.WORKED_TOL)


def test_ml_anchor_one_millimetre_at_100_km() -> None:
    """Richter's anchor, ML 3 for 1 mm at 100 km: 3.0009 IASPEI, 3.0000 HB87.

    docs/check-values.md §8.
    """
    assert float(ml(1.0, 100.0, unit="mm_wa")) == pytest.approx(3.0009, abs=ref.WORKED_TOL)
    assert float(ml(1.0, 100.0, unit="mm_wa", correction=HB87_MM)) == pytest.approx(3.0, abs=1e-12)


@pytest.mark.parametrize(("a_mm", "r_km", "hb87", "iaspei"), ref.HB87_VALUES)
def test_hutton_boore_and_iaspei_forms(
    a_mm: float, r_km: float, hb87: float, iaspei: float
) -> None:
    """docs/check-values.md §1, §4 (computed): HB87 1.7199 at 10 km, 3.9076 at 300 km for 1 mm."""
    assert float(ml(a_mm, r_km, unit="mm_wa", correction=HB87_MM)) == pytest.approx(
        hb87, abs=ref.WORKED_TOL
    )
    assert float(ml(a_mm, r_km, unit="mm_wa", correction=HB87)) == pytest.approx(
        iaspei, abs=ref.WORKED_TOL
    )
    # the two differ by the rounding of -2.09 only: 0.0009 at every distance
    # (docs/check-values.md §1)
    gap = ml(a_mm, r_km, unit="mm_wa") - ml(a_mm, r_km, unit="mm_wa", correction=HB87_MM)
    assert float(gap) == pytest.approx(0.00094, abs=2e-5)


@pytest.mark.parametrize("timespan", ref.OBSPY_TIMESPANS_S)
@pytest.mark.parametrize(("a_mm", "r_km", "printed"), ref.BJ84_PRINTED)
def test_bakun_joyner_matches_obspy_estimate_magnitude(
    a_mm: float, r_km: float, printed: float, timespan: float
) -> None:
    """docs/check-values.md §4: obspy's estimate_magnitude on the Wood-Anderson response is BJ84."""
    from obspy.signal.invsim import WOODANDERSON, estimate_magnitude

    obspy_ml = estimate_magnitude(WOODANDERSON, 2.0 * a_mm / 1000.0, timespan, r_km)
    ours = float(ml(a_mm, r_km, unit="mm_wa", correction=BJ84))
    assert ours == pytest.approx(obspy_ml, abs=ref.OBSPY_BJ84_TOL)
    assert ours == pytest.approx(printed, abs=ref.WORKED_TOL)


def test_bakun_joyner_vectorized_against_obspy_on_a_grid() -> None:
    """Same check over a grid of amplitudes and distances inside BJ84's range, one call."""
    from obspy.signal.invsim import WOODANDERSON, estimate_magnitude

    a_mm = np.array([0.01, 0.3, 1.0, 7.5, 120.0])
    r_km = np.array([5.0, 40.0, 100.0, 250.0, 399.0])
    ours = ml(a_mm[:, None], r_km[None, :], unit="mm_wa", correction=BJ84)
    theirs = np.array(
        [[estimate_magnitude(WOODANDERSON, 2.0 * a / 1000.0, 0.4, r) for r in r_km] for a in a_mm]
    )
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=ref.OBSPY_BJ84_TOL)


@pytest.mark.parametrize(("a_nm", "period", "dist", "depth", "q", "expected"), ref.MB)
def test_mb_worked_examples(
    a_nm: float, period: float, dist: float, depth: float, q: float, expected: float
) -> None:
    """docs/check-values.md §3 #5, #6: mb = log10(A/T) + Q - 3.0 with G&R Q at h = 0."""
    assert float(GR56_Q(dist, depth)) == pytest.approx(q, abs=1e-12)
    assert float(mb(a_nm, period, dist, depth)) == pytest.approx(expected, abs=ref.WORKED_TOL)
    # the um form of the 2005 standard gives the same number (docs/check-values.md §1 "Units")
    assert float(mb(a_nm / 1000.0, period, dist, depth, unit="um")) == pytest.approx(
        expected, abs=ref.WORKED_TOL
    )


@pytest.mark.parametrize(("vmax", "dist", "depth", "q", "expected"), ref.MB_BB)
def test_mb_bb_worked_example(
    vmax: float, dist: float, depth: float, q: float, expected: float
) -> None:
    """docs/check-values.md §3 #7: mB_BB = log10(Vmax/2π) + Q - 3.0."""
    assert float(GR56_Q(dist, depth)) == pytest.approx(q, abs=1e-12)
    assert float(mb_bb(vmax, dist, depth)) == pytest.approx(expected, abs=ref.WORKED_TOL)


@pytest.mark.parametrize(("a_nm", "period", "dist", "expected"), ref.MS_20)
def test_ms_20_worked_examples_and_lahr_table(
    a_nm: float, period: float, dist: float, expected: float
) -> None:
    """docs/check-values.md §3 #8, #9 and Lahr's amplitudes for Ms 5 at 20, 50, 100 and 160 deg."""
    assert float(ms_20(a_nm, period, dist, 10.0)) == pytest.approx(expected, abs=ref.WORKED_TOL)


@pytest.mark.parametrize(("vmax", "dist", "period", "expected"), ref.MS_BB)
def test_ms_bb_worked_examples(vmax: float, dist: float, period: float, expected: float) -> None:
    """docs/check-values.md §3 #10 and Lahr's velocity column (4.9998, rounded velocities)."""
    value = ms_bb(vmax, dist, 10.0, period_s=period)
    assert float(value) == pytest.approx(expected, abs=ref.WORKED_TOL)


@pytest.mark.parametrize(("dist", "term"), ref.MS_DISTANCE_TERM)
def test_ms_distance_term(dist: float, term: float) -> None:
    """docs/check-values.md §1 notes: 1.66 log10(Δ) = 3.32 at 100 deg, 2.15971 at 20 deg (computed).

    Isolated as Ms_20 of A/T = 1 nm/s minus the constant 0.3.
    """
    assert float(ms_20(20.0, 20.0, dist, 0.0)) - 0.3 == pytest.approx(term, abs=1e-5)


@pytest.mark.parametrize(("a_nm", "r_km", "gamma", "expected"), ref.MB_LG)
def test_mb_lg_worked_examples(a_nm: float, r_km: float, gamma: float, expected: float) -> None:
    """docs/check-values.md §3 #11, #12 (formula from memory)."""
    value = mb_lg(a_nm, r_km, gamma_per_km=gamma)
    assert float(value) == pytest.approx(expected, abs=ref.WORKED_TOL)


@pytest.mark.parametrize(("m0", "expected"), ref.MW_IASPEI)
def test_mw_iaspei_worked_examples(m0: float, expected: float) -> None:
    """docs/check-values.md §3 #13, #14 (constant 9.1 from memory)."""
    assert float(mw(m0)) == pytest.approx(expected, abs=ref.WORKED_TOL)


@pytest.mark.parametrize(("m0", "hk79", "iaspei"), ref.MW_HK79)
def test_mw_hanks_kanamori_matches_pyrocko_values(m0: float, hk79: float, iaspei: float) -> None:
    """docs/check-values.md §5: pyrocko's moment_to_magnitude values; offset 0.0333 to IASPEI."""
    assert float(mw(m0, form="HK79")) == pytest.approx(hk79, abs=ref.WORKED_TOL)
    assert float(mw(m0)) == pytest.approx(iaspei, abs=ref.WORKED_TOL)
    assert float(mw(m0, form="HK79") - mw(m0)) == pytest.approx(
        ref.MW_HK79_OFFSET, abs=ref.WORKED_TOL
    )


@pytest.mark.parametrize(
    ("table", "row_0"),
    [(GR56_Q, ref.Q_GR56_SHALLOW), (GR56_CHART_Q, ref.Q_CHART_H0)],
    ids=["GR56-Q", "GR56-chart-Q"],
)
def test_q_tables_at_tabulated_points(table: QTable, row_0: tuple[float, ...]) -> None:
    """docs/check-values.md §2: Q at h = 0 and 500 km within 0.1 of both digitisations."""
    dist = np.array(ref.Q_DISTANCES_DEG, dtype=float)
    q0 = table(dist, 0.0)
    q500 = table(dist, 500.0)
    np.testing.assert_allclose(q0, row_0, atol=1e-12)  # the row the table was built from
    np.testing.assert_allclose(q0, ref.Q_GR56_SHALLOW, atol=ref.Q_TOL + 1e-9)
    np.testing.assert_allclose(q0, ref.Q_CHART_H0, atol=ref.Q_TOL + 1e-9)
    np.testing.assert_allclose(q500, ref.Q_CHART_H500, atol=1e-12)


def test_formula_docstring_examples_run() -> None:
    """The Examples sections of the formula modules run (numpydoc, docs/conventions.md item 18)."""
    modules = (
        stations.formulas.local,
        stations.formulas.body,
        stations.formulas.surface,
        stations.formulas.regional,
        stations.formulas.moment,
        stations.formulas.units,
        stations.formulas.batch,
    )
    for module in modules:
        result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
        assert result.failed == 0, module.__name__
        assert result.attempted > 0, module.__name__
