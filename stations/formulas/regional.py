"""Regional body-wave magnitude mb_Lg (IASPEI 2013 form; **formula from memory**).

    mb_Lg = log10(A) + 0.833 log10(r) + 0.4343 γ (r - 10) - 0.87

A: "sustained" Lg amplitude (the third-largest peak), nm, vertical, WWSSN-SP simulated, read in
the Lg group-velocity window 3.6-3.2 km/s at periods 0.7-1.3 s; r: epicentral distance, km;
γ: regional anelastic attenuation coefficient, 1/km, which has no default (it is regional).

Status: the equation is **from memory** of the IASPEI 2013 recommendations
(docs/check-values.md §1); it is consistent with Herrmann & Kijko (1983), whose constant
2.96 - 0.833 - 3 = -0.873 matches the rounded -0.87 (abstract verified, formula from memory). The
period range 0.7-1.3 s is from memory too and is checked only where a period is given. Verified
sources name only "regional distances" for the range, so only r > 0 is enforced.

References
----------
IASPEI (2013). Magnitude Working Group recommendations (mb_Lg).
Herrmann, R. B., & Kijko, A. (1983). Modeling some empirical vertical component Lg relations.
BSSA 73(1), 157-171.
"""

from __future__ import annotations

from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import ConfigError
from stations.formulas.domain import (
    DomainPolicy,
    Evaluation,
    ReasonBuilder,
    broadcast_float,
    finish,
    require_positive,
    require_range,
)
from stations.formulas.units import DISPLACEMENT_UNITS, convert_amplitude
from stations.schema import AmplitudeUnit

__all__ = ["MB_LG_PERIOD_RANGE_S", "evaluate_mb_lg", "mb_lg"]

#: Period range of the Lg amplitude, s (IASPEI 2013; from memory).
MB_LG_PERIOD_RANGE_S: Final = (0.7, 1.3)


def evaluate_mb_lg(
    amplitude: ArrayLike,
    distance_km: ArrayLike,
    *,
    gamma_per_km: float,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
) -> Evaluation:
    """Evaluate mb_Lg with per-input domain reasons (see :func:`mb_lg`; no policy applied)."""
    if not (np.isfinite(gamma_per_km) and gamma_per_km >= 0.0):
        raise ConfigError(
            "The 'gamma_per_km' parameter of mb_Lg must be a float in the range [0, inf). "
            f"Got {gamma_per_km!r} instead."
        )
    a_nm = convert_amplitude(amplitude, unit, formula="mb_Lg", accepted=DISPLACEMENT_UNITS)
    a_nm, r, period = broadcast_float(a_nm, distance_km, period_s)
    reasons = ReasonBuilder(a_nm.shape)
    require_positive(reasons, a_nm, "amplitude", "nm")
    require_positive(reasons, r, "epicentral distance", "km")
    require_range(
        reasons, period, *MB_LG_PERIOD_RANGE_S, what="period", unit="s",
        source="mb_Lg period range, from memory",
    )  # fmt: skip
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(a_nm) + 0.833 * np.log10(r) + 0.4343 * gamma_per_km * (r - 10.0) - 0.87
    label = f"mb_Lg IASPEI-2013 gamma={gamma_per_km:g}/km (formula from memory)"
    return finish(label, value, reasons)


def mb_lg(
    amplitude: ArrayLike,
    distance_km: ArrayLike,
    *,
    gamma_per_km: float,
    period_s: ArrayLike = np.nan,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Regional Lg magnitude mb_Lg (formula from memory; see the module docstring).

    Parameters
    ----------
    amplitude : array_like of float
        Sustained Lg amplitude (third-largest peak), vertical, WWSSN-SP simulated, in ``unit``.
    distance_km : array_like of float
        Epicentral distance r, km.
    gamma_per_km : float
        Regional attenuation coefficient γ, 1/km (>= 0; no default).
    period_s : array_like of float, optional
        Period, s; checked against 0.7-1.3 s (from memory) where given.
    unit : {"nm", "um"}, default="nm"
        Unit of ``amplitude``.
    policy : {"raise", "nan", "compute"}, default="raise"
        Out-of-domain policy.

    Returns
    -------
    ndarray of float64
        mb_Lg.

    Raises
    ------
    UnitError
        If ``unit`` is not a displacement unit.
    ConfigError
        If ``gamma_per_km`` is negative or not finite.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable.

    Examples
    --------
    >>> round(float(mb_lg(100.0, 300.0, gamma_per_km=0.0)), 4)
    3.1934
    """
    return evaluate_mb_lg(
        amplitude, distance_km, gamma_per_km=gamma_per_km, period_s=period_s, unit=unit
    ).resolve(policy)
