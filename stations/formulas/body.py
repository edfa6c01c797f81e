"""Teleseismic body-wave magnitudes mb and mB_BB (IASPEI standard, nm form).

**mb** = log10(A/T) + Q(Δ, h) - 3.0

- A: P-wave ground displacement, nm, maximum trace amplitude in the P train before PP,
  vertical component, on a WWSSN-SP-simulated record; T: its period, s.
- Range: 20 deg <= Δ <= 100 deg; T < 3.0 s.
- Status: A and the ranges verified (ISC amplitude page citing IASPEI 2013); the printed
  "-3.0" of the nm form from memory (it is log10 1000 against the µm form).

**mB_BB** = log10(Vmax / 2π) + Q(Δ, h) - 3.0

- Vmax: maximum vertical ground velocity in the whole P train, nm/s, broadband record.
- Range: 20 deg <= Δ <= 100 deg; T 0.2-30 s where a period is given (from memory).
- Status: (A/T)max = Vmax/2π with G&R's Q verified (Entwistle et al. 2017, µm form).

Q is Gutenberg & Richter's (1956) PZ correction, from a :class:`~stations.formulas.qtable.QTable`
(default ``GR56-Q``; see that module for the source and the interpolation, which is an
approximation in depth). The -3.0 converts the µm form of the 2005 standard (log10(A/T) + Q,
A in µm) to A in nm: log10(1000) = 3. Q is defined only inside its grid (16-109 deg,
0-500 km for the shipped tables): outside, the magnitude is not computable. Depths above sea
level (h < 0) take Q at 0 km and are flagged out of domain.

References
----------
IASPEI (2013). Summary of Magnitude Working Group recommendations on standard procedures for
determining earthquake magnitudes from digital data. Bormann & Dewey (2014), NMSOP-2 IS 3.3.
ISC, automatic amplitude and period measurements (project page; mb definition and ranges).
Entwistle, E., Di Giacomo, D., & Storchak, D. A. (2017). IAG-IASPEI abstract S01-2-01 (mB_BB).
Gutenberg, B., & Richter, C. F. (1956). Annali di Geofisica 9(1), 1-15.
"""

from __future__ import annotations

from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.formulas.domain import (
    DomainPolicy,
    Evaluation,
    ReasonBuilder,
    broadcast_float,
    finish,
    require_positive,
    require_range,
)
from stations.formulas.qtable import GR56_Q, QTable
from stations.formulas.units import DISPLACEMENT_UNITS, VELOCITY_UNITS, convert_amplitude
from stations.schema import AmplitudeUnit

__all__ = [
    "MB_BB_PERIOD_RANGE_S",
    "MB_DISTANCE_RANGE_DEG",
    "MB_MAX_PERIOD_S",
    "evaluate_mb",
    "evaluate_mb_bb",
    "mb",
    "mb_bb",
]

#: Distance range of mb and mB_BB, degrees (ISC amplitude page citing IASPEI 2013; verified).
MB_DISTANCE_RANGE_DEG: Final = (20.0, 100.0)
#: mb periods must be below this, s (same source; verified).
MB_MAX_PERIOD_S: Final = 3.0
#: mB_BB period range, s, exclusive ends (IASPEI 2013; from memory).
MB_BB_PERIOD_RANGE_S: Final = (0.2, 30.0)
_SOURCE: Final = "IASPEI 2013 standard range"


def _distance_depth_checks(
    reasons: ReasonBuilder, dist: NDArray[np.float64], depth: NDArray[np.float64], table: QTable
) -> NDArray[np.float64]:
    """Add the Q look-up and distance checks; return the depth at which Q is taken."""
    require_positive(reasons, dist, "epicentral distance", "deg")
    reasons.fail(np.isnan(depth), "event depth is missing (Q needs it)", computable=False)
    d_lo, d_hi = table.distance_range
    require_range(
        reasons, dist, d_lo, d_hi, what="distance", unit="deg",
        source=f"the {table.name} table has no Q there", computable=False,
    )  # fmt: skip
    require_range(
        reasons, depth, -np.inf, table.depth_range[1], what="depth", unit="km",
        source=f"the {table.name} table has no Q there", computable=False,
    )  # fmt: skip
    require_range(
        reasons, depth, table.depth_range[0], np.inf, what="depth", unit="km",
        source=f"above the {table.name} table; Q taken at {table.depth_range[0]:g} km",
    )  # fmt: skip
    require_range(
        reasons, dist, *MB_DISTANCE_RANGE_DEG, what="distance", unit="deg", source=_SOURCE
    )
    return np.maximum(depth, table.depth_range[0])


def evaluate_mb(
    amplitude: ArrayLike,
    period_s: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    q_table: QTable = GR56_Q,
) -> Evaluation:
    """Evaluate mb with per-input domain reasons (see :func:`mb`; no policy applied)."""
    a_nm = convert_amplitude(amplitude, unit, formula="mb", accepted=DISPLACEMENT_UNITS)
    a_nm, period, dist, depth = broadcast_float(a_nm, period_s, distance_deg, depth_km)
    reasons = ReasonBuilder(a_nm.shape)
    require_positive(reasons, a_nm, "amplitude", "nm")
    require_positive(reasons, period, "period", "s")
    q_depth = _distance_depth_checks(reasons, dist, depth, q_table)
    require_range(
        reasons, period, 0.0, MB_MAX_PERIOD_S, what="period", unit="s", source=_SOURCE,
        high_open=True,
    )  # fmt: skip
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(a_nm / period) + q_table(dist, q_depth) - 3.0
    return finish(f"mb IASPEI-2013 {q_table.name}", value, reasons)


def mb(
    amplitude: ArrayLike,
    period_s: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    q_table: QTable = GR56_Q,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Short-period body-wave magnitude mb = log10(A/T) + Q(Δ, h) - 3.0, vectorized.

    Parameters
    ----------
    amplitude : array_like of float
        Maximum P-wave trace amplitude (ground displacement, vertical, WWSSN-SP simulated)
        in ``unit``.
    period_s : array_like of float
        Period of that amplitude, s; the standard requires T < 3.0 s.
    distance_deg : array_like of float
        Epicentral distance, degrees; the standard range is 20-100 deg.
    depth_km : array_like of float
        Event depth, km below sea level (Q depends on it).
    unit : {"nm", "um"}, default="nm"
        Unit of ``amplitude``; a velocity or Wood-Anderson unit raises ``UnitError``.
    q_table : QTable, default=GR56_Q
        The Q(Δ, h) grid.
    policy : {"raise", "nan", "compute"}, default="raise"
        Out-of-domain policy (:mod:`stations.formulas.domain`).

    Returns
    -------
    ndarray of float64
        mb, broadcast shape of the inputs.

    Raises
    ------
    UnitError
        If ``unit`` is not a displacement unit.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable.

    Warns
    -----
    OutOfDomainWarning
        With ``policy="nan"`` or ``"compute"``.

    Notes
    -----
    Equation, ranges and status in the module docstring; Q's interpolation and its limits in
    :mod:`stations.formulas.qtable`.

    Examples
    --------
    >>> round(float(mb(100.0, 1.0, 50.0, 0.0)), 4)  # Q(50 deg, 0 km) = 6.7
    5.7
    """
    return evaluate_mb(
        amplitude, period_s, distance_deg, depth_km, unit=unit, q_table=q_table
    ).resolve(policy)


def evaluate_mb_bb(
    velocity: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm_per_s,
    q_table: QTable = GR56_Q,
    period_range_s: tuple[float, float] = MB_BB_PERIOD_RANGE_S,
) -> Evaluation:
    """Evaluate mB_BB with per-input domain reasons (see :func:`mb_bb`; no policy applied)."""
    v = convert_amplitude(velocity, unit, formula="mB_BB", accepted=VELOCITY_UNITS)
    v, dist, depth, period = broadcast_float(v, distance_deg, depth_km, period_s)
    reasons = ReasonBuilder(v.shape)
    require_positive(reasons, v, "Vmax", "nm/s")
    q_depth = _distance_depth_checks(reasons, dist, depth, q_table)
    require_range(
        reasons, period, *period_range_s, what="period", unit="s",
        source="IASPEI 2013 range, from memory", low_open=True, high_open=True,
    )  # fmt: skip
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(v / (2.0 * np.pi)) + q_table(dist, q_depth) - 3.0
    return finish(f"mB_BB IASPEI-2013 {q_table.name}", value, reasons)


def mb_bb(
    velocity: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm_per_s,
    q_table: QTable = GR56_Q,
    period_range_s: tuple[float, float] = MB_BB_PERIOD_RANGE_S,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Broadband body-wave magnitude mB_BB = log10(Vmax/2π) + Q(Δ, h) - 3.0, vectorized.

    Parameters
    ----------
    velocity : array_like of float
        Vmax, the maximum vertical ground velocity in the whole P train, in ``unit``.
    distance_deg : array_like of float
        Epicentral distance, degrees (standard range 20-100 deg).
    depth_km : array_like of float
        Event depth, km below sea level.
    period_s : array_like of float, optional
        Period at Vmax, s; checked against ``period_range_s`` where given (NaN: not checked).
    unit : {"nm/s", "um/s"}, default="nm/s"
        Unit of ``velocity``; a displacement unit raises ``UnitError``.
    q_table : QTable, default=GR56_Q
        The Q(Δ, h) grid (the same as for mb).
    period_range_s : (float, float), default=(0.2, 30.0)
        Open period interval of the standard (IASPEI 2013, from memory; configurable).
    policy : {"raise", "nan", "compute"}, default="raise"
        Out-of-domain policy.

    Returns
    -------
    ndarray of float64
        mB_BB.

    Raises
    ------
    UnitError
        If ``unit`` is not a velocity unit.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable.

    Examples
    --------
    >>> round(float(mb_bb(1000.0, 60.0, 0.0)), 4)  # Q(60 deg, 0 km) = 6.8
    6.0018
    """
    return evaluate_mb_bb(
        velocity, distance_deg, depth_km, period_s=period_s, unit=unit, q_table=q_table,
        period_range_s=period_range_s,
    ).resolve(policy)  # fmt: skip
