"""Amplitude units of the magnitude formulas: explicit conversion, typed refusal of a wrong unit.

Every formula states the physical quantity it needs and the units it accepts:

=================== ================================== =========================================
unit                quantity                           conversion to the formula's unit
=================== ================================== =========================================
``nm``              displacement (ground, or Wood-     x 1
                    Anderson-simulated with static
                    magnification 1 for ML)
``um``              displacement                       x 1000 nm/um
``mm_wa``           trace amplitude on a Wood-Anderson x 1e6 / 2080 (nm of magnification-1
                    record, static magnification 2080  displacement); ML only
``nm/s``            ground velocity                    x 1
``um/s``            ground velocity                    x 1000
=================== ================================== =========================================

The Wood-Anderson magnification 2080 is the measured one the IASPEI standard builds its ML
constant -2.09 on, not the nominal 2800 (IASPEI standard procedures for magnitude determination,
ML section; Uhrhammer & Collins 1990). A unit of the wrong kind (a velocity for ML, mb or Ms_20;
a displacement for mB_BB or Ms_BB; a Wood-Anderson reading for anything but ML) raises
:class:`~stations.errors.UnitError`; there is no silent factor of 1000.

References
----------
IASPEI (2013). Summary of Magnitude Working Group recommendations on standard procedures for
determining earthquake magnitudes from digital data.
Uhrhammer, R. A., & Collins, E. R. (1990). Synthesis of Wood-Anderson seismograms from
broadband digital records. BSSA 80(3), 702-716.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import UnitError
from stations.schema import AmplitudeUnit

__all__ = [
    "DISPLACEMENT_UNITS",
    "VELOCITY_UNITS",
    "WOOD_ANDERSON_MAGNIFICATION",
    "WOOD_ANDERSON_UNITS",
    "convert_amplitude",
    "parse_unit",
    "unit_error_message",
]

#: Static magnification of the Wood-Anderson seismograph used by the IASPEI ML standard.
WOOD_ANDERSON_MAGNIFICATION: Final = 2080.0

#: Factor to the formula's base unit (nm or nm/s) for each amplitude unit.
_TO_BASE: Final[dict[AmplitudeUnit, float]] = {
    AmplitudeUnit.nm: 1.0,
    AmplitudeUnit.um: 1.0e3,
    AmplitudeUnit.mm_wa: 1.0e6 / WOOD_ANDERSON_MAGNIFICATION,
    AmplitudeUnit.nm_per_s: 1.0,
    AmplitudeUnit.um_per_s: 1.0e3,
}
_KIND: Final[dict[AmplitudeUnit, str]] = {
    AmplitudeUnit.nm: "a displacement",
    AmplitudeUnit.um: "a displacement",
    AmplitudeUnit.mm_wa: "a Wood-Anderson trace reading",
    AmplitudeUnit.nm_per_s: "a velocity",
    AmplitudeUnit.um_per_s: "a velocity",
}

#: Units accepted by the displacement formulas on simulated short- or long-period records.
DISPLACEMENT_UNITS: Final = (AmplitudeUnit.nm, AmplitudeUnit.um)
#: Units accepted by ML: displacement on a Wood-Anderson response, or the trace reading itself.
WOOD_ANDERSON_UNITS: Final = (AmplitudeUnit.nm, AmplitudeUnit.um, AmplitudeUnit.mm_wa)
#: Units accepted by the broadband velocity formulas (mB_BB, Ms_BB).
VELOCITY_UNITS: Final = (AmplitudeUnit.nm_per_s, AmplitudeUnit.um_per_s)


def parse_unit(unit: str | AmplitudeUnit) -> AmplitudeUnit:
    """Return the :class:`~stations.schema.AmplitudeUnit` named by ``unit``.

    Raises
    ------
    UnitError
        If ``unit`` is not one of the unit names; the message lists them.
    """
    try:
        return AmplitudeUnit(unit)
    except ValueError:
        allowed = ", ".join(u.value for u in AmplitudeUnit)
        raise UnitError(f"unknown amplitude unit {unit!r}; use one of {allowed}") from None


def unit_error_message(unit: AmplitudeUnit, formula: str, accepted: Iterable[AmplitudeUnit]) -> str:
    """The one-line :class:`UnitError` text for ``unit`` refused by ``formula``."""
    accepted = tuple(accepted)
    names = ", ".join(u.value for u in accepted)
    if accepted and accepted[0] in VELOCITY_UNITS:
        need = "a ground velocity"
        fix = "give the velocity reading, or use a displacement scale (mb, Ms_20)"
    elif AmplitudeUnit.mm_wa in accepted:
        need = "a Wood-Anderson displacement"
        fix = "give the Wood-Anderson amplitude (nm, um or mm_wa)"
    else:
        need = "a ground displacement"
        fix = (
            "a Wood-Anderson reading belongs to ML"
            if unit is AmplitudeUnit.mm_wa
            else "give the displacement reading, or use a velocity scale (mB_BB, Ms_BB)"
        )
    return f"{formula} needs {need} in {names}; got {unit.value!r}, which is {_KIND[unit]}: {fix}"


def convert_amplitude(
    amplitude: ArrayLike,
    unit: str | AmplitudeUnit,
    *,
    formula: str,
    accepted: Iterable[AmplitudeUnit],
) -> NDArray[np.float64]:
    """Convert amplitudes to the base unit of ``formula`` (nm or nm/s), refusing wrong kinds.

    Parameters
    ----------
    amplitude : array_like of float
        Amplitudes in ``unit``.
    unit : str or AmplitudeUnit
        Unit of every value in ``amplitude``.
    formula : str
        Name used in the error message (e.g. ``"ML"``).
    accepted : iterable of AmplitudeUnit
        Units the formula takes; the first one fixes the base unit's kind.

    Returns
    -------
    ndarray of float64
        Amplitudes in nm (displacement formulas, including ML on a magnification-1
        Wood-Anderson response) or nm/s (velocity formulas).

    Raises
    ------
    UnitError
        If ``unit`` is unknown or not in ``accepted``.

    Examples
    --------
    >>> float(convert_amplitude(1.0, "mm_wa", formula="ML", accepted=WOOD_ANDERSON_UNITS))
    480.7692307692308
    """
    parsed = parse_unit(unit)
    accepted = tuple(accepted)
    if parsed not in accepted:
        raise UnitError(unit_error_message(parsed, formula, accepted))
    return np.asarray(amplitude, dtype=np.float64) * _TO_BASE[parsed]
