"""Surface-wave magnitudes Ms_20 and Ms_BB (IASPEI standard, nm form).

**Ms_20** = log10(A/T) + 1.66 log10(Δ) + 0.3

- A: vertical ground displacement, nm, maximum surface-wave trace amplitude on a
  WWSSN-LP-simulated record; T: its period, s.
- Range: 18 s <= T <= 22 s; 20 deg <= Δ <= 160 deg; depth < 60 km.
- Status: verified in the µm form (IASPEI 2005); depth limit verified (Havskov & Ottemöller
  2010).

**Ms_BB** = log10(Vmax/2π) + 1.66 log10(Δ) + 0.3

- Vmax: vertical ground velocity, nm/s, velocity-proportional broadband record.
- Range: 2 deg <= Δ <= 160 deg; depth < 60 km; T 2-60 s where a period is given.
- Status: formula and distance range verified (Havskov & Ottemöller 2010).

The 2005 text uses A in µm and +3.3; the nm form has +0.3 (log10 1000 = 3). The Ms_BB period
range conflicts between sources: 2-60 s in Havskov & Ottemöller (2010, verified; the default)
and 3-60 s in the 2013 recommendations (from memory); it is a parameter. The plain 1.66
log10(Δ) term ignores antipodal focusing beyond about 130 deg (J. C. Lahr, "Surface-wave
magnitude distance factor", verified); the standard still extends to 160 deg.
An unknown event depth leaves the h < 60 km condition unchecked: the input is flagged out of
domain (the equation itself does not use h).

References
----------
IASPEI (2005). IASPEI's standard procedures for magnitude determinations. IASPEI (2013),
Magnitude Working Group recommendations.
Havskov, J., & Ottemöller, L. (2010). Routine Data Processing in Earthquake Seismology,
§6.6-6.7. Springer.
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
from stations.formulas.units import DISPLACEMENT_UNITS, VELOCITY_UNITS, convert_amplitude
from stations.schema import AmplitudeUnit

__all__ = [
    "MS_20_DISTANCE_RANGE_DEG",
    "MS_20_PERIOD_RANGE_S",
    "MS_BB_DISTANCE_RANGE_DEG",
    "MS_BB_PERIOD_RANGE_S",
    "MS_MAX_DEPTH_KM",
    "evaluate_ms_20",
    "evaluate_ms_bb",
    "ms_20",
    "ms_bb",
]

#: Ms_20 distance range, degrees (IASPEI 2005, verified).
MS_20_DISTANCE_RANGE_DEG: Final = (20.0, 160.0)
#: Ms_20 period range, s (IASPEI 2005, verified).
MS_20_PERIOD_RANGE_S: Final = (18.0, 22.0)
#: Ms_BB distance range, degrees (Havskov & Ottemöller 2010, verified).
MS_BB_DISTANCE_RANGE_DEG: Final = (2.0, 160.0)
#: Ms_BB period range, s (Havskov & Ottemöller 2010, verified; 2013: 3-60 s from memory).
MS_BB_PERIOD_RANGE_S: Final = (2.0, 60.0)
#: Both Ms scales are for shallow events, depth < 60 km (Havskov & Ottemöller 2010, verified).
MS_MAX_DEPTH_KM: Final = 60.0


def _distance_term(reasons: ReasonBuilder, dist: NDArray[np.float64]) -> NDArray[np.float64]:
    require_positive(reasons, dist, "epicentral distance", "deg")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(1.66 * np.log10(dist) + 0.3, dtype=np.float64)


def _depth_check(reasons: ReasonBuilder, depth: NDArray[np.float64], name: str) -> None:
    reasons.fail(
        np.isnan(depth),
        f"event depth unknown ({name} requires depth < {MS_MAX_DEPTH_KM:g} km)",
        computable=True,
    )
    require_range(
        reasons, depth, -np.inf, MS_MAX_DEPTH_KM, what="depth", unit="km",
        source=f"{name} is for shallow events", high_open=True,
    )  # fmt: skip


def evaluate_ms_20(
    amplitude: ArrayLike,
    period_s: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
) -> Evaluation:
    """Evaluate Ms_20 with per-input domain reasons (see :func:`ms_20`; no policy applied)."""
    a_nm = convert_amplitude(amplitude, unit, formula="Ms_20", accepted=DISPLACEMENT_UNITS)
    a_nm, period, dist, depth = broadcast_float(a_nm, period_s, distance_deg, depth_km)
    reasons = ReasonBuilder(a_nm.shape)
    require_positive(reasons, a_nm, "amplitude", "nm")
    require_positive(reasons, period, "period", "s")
    term = _distance_term(reasons, dist)
    require_range(
        reasons, dist, *MS_20_DISTANCE_RANGE_DEG, what="distance", unit="deg",
        source="IASPEI standard range",
    )  # fmt: skip
    require_range(
        reasons, period, *MS_20_PERIOD_RANGE_S, what="period", unit="s",
        source="IASPEI standard range",
    )  # fmt: skip
    _depth_check(reasons, depth, "Ms_20")
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(a_nm / period) + term
    return finish("Ms_20 IASPEI-2013", value, reasons)


def ms_20(
    amplitude: ArrayLike,
    period_s: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Surface-wave magnitude at 20 s, Ms_20 = log10(A/T) + 1.66 log10(Δ) + 0.3, vectorized.

    Parameters
    ----------
    amplitude : array_like of float
        Maximum surface-wave trace amplitude (vertical ground displacement, WWSSN-LP
        simulated) in ``unit``.
    period_s : array_like of float
        Its period, s (standard: 18-22 s).
    distance_deg : array_like of float
        Epicentral distance, degrees (standard: 20-160 deg).
    depth_km : array_like of float
        Event depth, km (standard: < 60 km; NaN = unknown, flagged).
    unit : {"nm", "um"}, default="nm"
        Unit of ``amplitude``.
    policy : {"raise", "nan", "compute"}, default="raise"
        Out-of-domain policy (:mod:`stations.formulas.domain`).

    Returns
    -------
    ndarray of float64
        Ms_20.

    Raises
    ------
    UnitError
        If ``unit`` is not a displacement unit.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable.

    Examples
    --------
    >>> round(float(ms_20(1000.0, 20.0, 50.0, 10.0)), 4)
    4.8193
    """
    return evaluate_ms_20(amplitude, period_s, distance_deg, depth_km, unit=unit).resolve(policy)


def evaluate_ms_bb(
    velocity: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm_per_s,
    period_range_s: tuple[float, float] = MS_BB_PERIOD_RANGE_S,
) -> Evaluation:
    """Evaluate Ms_BB with per-input domain reasons (see :func:`ms_bb`; no policy applied)."""
    v = convert_amplitude(velocity, unit, formula="Ms_BB", accepted=VELOCITY_UNITS)
    v, dist, depth, period = broadcast_float(v, distance_deg, depth_km, period_s)
    reasons = ReasonBuilder(v.shape)
    require_positive(reasons, v, "Vmax", "nm/s")
    term = _distance_term(reasons, dist)
    require_range(
        reasons, dist, *MS_BB_DISTANCE_RANGE_DEG, what="distance", unit="deg",
        source="IASPEI standard range",
    )  # fmt: skip
    require_range(
        reasons, period, *period_range_s, what="period", unit="s",
        source="Ms_BB period range",
    )  # fmt: skip
    _depth_check(reasons, depth, "Ms_BB")
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(v / (2.0 * np.pi)) + term
    return finish("Ms_BB IASPEI-2013", value, reasons)


def ms_bb(
    velocity: ArrayLike,
    distance_deg: ArrayLike,
    depth_km: ArrayLike,
    *,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm_per_s,
    period_range_s: tuple[float, float] = MS_BB_PERIOD_RANGE_S,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Broadband surface-wave magnitude Ms_BB = log10(Vmax/2π) + 1.66 log10(Δ) + 0.3.

    Parameters
    ----------
    velocity : array_like of float
        Vmax, maximum vertical ground velocity of the surface wave train, in ``unit``.
    distance_deg : array_like of float
        Epicentral distance, degrees (standard: 2-160 deg).
    depth_km : array_like of float
        Event depth, km (standard: < 60 km; NaN = unknown, flagged).
    period_s : array_like of float, optional
        Period at Vmax, s; checked against ``period_range_s`` where given.
    unit : {"nm/s", "um/s"}, default="nm/s"
        Unit of ``velocity``.
    period_range_s : (float, float), default=(2.0, 60.0)
        Closed period interval (Havskov & Ottemöller 2010; IASPEI 2013 3-60 s from memory).
    policy : {"raise", "nan", "compute"}, default="raise"
        Out-of-domain policy.

    Returns
    -------
    ndarray of float64
        Ms_BB.

    Raises
    ------
    UnitError
        If ``unit`` is not a velocity unit.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable.

    Examples
    --------
    >>> round(float(ms_bb(500.0, 10.0, 10.0)), 4)
    3.8608
    """
    return evaluate_ms_bb(
        velocity, distance_deg, depth_km, period_s=period_s, unit=unit,
        period_range_s=period_range_s,
    ).resolve(policy)  # fmt: skip
