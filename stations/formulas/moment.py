"""Moment magnitude Mw from the scalar seismic moment.

======================= ============================ =============================================
form                    equation (M0 in N·m)         status
======================= ============================ =============================================
``IASPEI-2013``         (2/3) (log10 M0 - 9.1)       IASPEI prescribes a standard Mw equation
(default)                                            (verified); the constant 9.1 is from memory
``HK79``                (2/3) log10(M0 · 1e7) - 10.7 Hanks & Kanamori (1979) with M0 in dyne·cm,
                        = (2/3) (log10 M0 - 9.05)    as pyrocko's ``moment_to_magnitude``
                                                     (docs/check-values.md §5, verified)
======================= ============================ =============================================

The two differ by the constant (2/3)·0.05 = 0.0333 at every moment.

References
----------
Hanks, T. C., & Kanamori, H. (1979). A moment magnitude scale. JGR 84(B5), 2348-2350.
IASPEI (2013). Magnitude Working Group recommendations (Mw).
"""

from __future__ import annotations

from typing import Final, Literal

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
)

__all__ = ["MW_FORMS", "evaluate_mw", "mw"]

MwForm = Literal["IASPEI-2013", "HK79"]
#: Constant c of Mw = (2/3)(log10 M0 - c), M0 in N·m, by form.
MW_FORMS: Final[dict[str, float]] = {"IASPEI-2013": 9.1, "HK79": 9.05}


def evaluate_mw(moment_nm: ArrayLike, *, form: MwForm = "IASPEI-2013") -> Evaluation:
    """Evaluate Mw with per-input reasons (see :func:`mw`; no policy applied)."""
    if form not in MW_FORMS:
        raise ConfigError(
            f"The 'form' parameter of Mw must be one of {', '.join(MW_FORMS)}. "
            f"Got {form!r} instead."
        )
    (m0,) = broadcast_float(moment_nm)
    reasons = ReasonBuilder(m0.shape)
    require_positive(reasons, m0, "seismic moment", "N·m")
    with np.errstate(invalid="ignore", divide="ignore"):
        value = (2.0 / 3.0) * (np.log10(m0) - MW_FORMS[form])
    return finish(f"Mw {form}", value, reasons)


def mw(
    moment_nm: ArrayLike, *, form: MwForm = "IASPEI-2013", policy: DomainPolicy = "raise"
) -> NDArray[np.float64]:
    """Moment magnitude from the scalar seismic moment, vectorized.

    Parameters
    ----------
    moment_nm : array_like of float
        Scalar seismic moment M0 in N·m (newton metres, not nanometres).
    form : {"IASPEI-2013", "HK79"}, default="IASPEI-2013"
        Which constant (module docstring).
    policy : {"raise", "nan", "compute"}, default="raise"
        What to do with missing or non-positive moments.

    Returns
    -------
    ndarray of float64
        Mw.

    Raises
    ------
    ConfigError
        If ``form`` is unknown.
    DomainError
        With ``policy="raise"``, for a missing or non-positive moment.

    Examples
    --------
    >>> round(float(mw(1.0e17)), 4)
    5.2667
    """
    return evaluate_mw(moment_nm, form=form).resolve(policy)
