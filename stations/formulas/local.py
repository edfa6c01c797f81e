"""Local magnitude ML with pluggable distance corrections -log A0(R).

IASPEI standard (IASPEI standard procedures for magnitude determination, ML section; the 2013
recommendations):

    ML = log10(A) + 1.11 log10(R) + 0.00189 R - 2.09

A is the maximum trace amplitude in nm on a horizontal component, on a record simulating a
Wood-Anderson seismograph of static magnification 1; R is the hypocentral distance in km
("typically less than 1000 km"). Each horizontal component is a datum of its own (no vector
sum). The standard allows other regions their own curve: ML = log10(A) + C(R) + D.

Here every curve is a :class:`DistanceCorrection`: a function of R in the Richter convention
(-log A0, for A in mm on a Wood-Anderson record of magnification 2080) or directly in the nm
convention of the IASPEI form. ML is then::

    ML = log10(A_nm) + C(R),  C(R) = -log A0(R) - log10(1e6 / 2080)   (mm convention)

so ``log10(A_mm) - log A0(R)`` is reproduced exactly for A_nm = A_mm * 1e6 / 2080.

============== ============================================================ ======== ==========
name           curve                                                        domain   status
============== ============================================================ ======== ==========
``HB87``       IASPEI: C(R) = 1.11 log10 R + 0.00189 R - 2.09 (nm)          0<R≤1000 verified
``HB87-mm``    Hutton & Boore (1987): -log A0 = 1.110 log10(R/100)          10-700   verified
               + 0.00189 (R - 100) + 3.0 (mm on WA 2080)                             (abstract)
``BJ84``       Bakun & Joyner (1984) eq. 3: -log A0 = log10(R/100)          0<R≤400  formula
               + 0.00301 (R - 100) + 3.0 (mm); obspy's ``estimate_magnitude``        verified;
                                                                                     range from
                                                                                     memory
user table     -log A0 against R from a CSV (:func:`read_distance_correction_csv`), table range
               linear interpolation in R, no extrapolation
============== ============================================================ ======== ==========

``HB87`` and ``HB87-mm`` differ by 0.0009 at every distance (-2.09 is rounded); at 100 km and
1 mm they give 3.0009 and 3.0000.

References
----------
Hutton, L. K., & Boore, D. M. (1987). The ML scale in southern California. BSSA 77(6),
2074-2094.
Bakun, W. H., & Joyner, W. B. (1984). The ML scale in central California. BSSA 74(5),
1827-1843.
Richter, C. F. (1935). An instrumental earthquake magnitude scale. BSSA 25(1), 1-32.
"""

from __future__ import annotations

import csv
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Final, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stations.errors import MalformedFileError
from stations.formulas.domain import (
    DomainPolicy,
    Evaluation,
    ReasonBuilder,
    broadcast_float,
    finish,
    require_positive,
    require_range,
)
from stations.formulas.units import (
    WOOD_ANDERSON_MAGNIFICATION,
    WOOD_ANDERSON_UNITS,
    convert_amplitude,
)
from stations.schema import AmplitudeUnit

__all__ = [
    "BJ84",
    "DISTANCE_CORRECTIONS",
    "HB87",
    "HB87_MM",
    "DistanceCorrection",
    "evaluate_ml",
    "ml",
    "read_distance_correction_csv",
]

#: log10 of nm per mm of Wood-Anderson trace (magnification 2080): converts -log A0 (mm) to C(R).
_LOG_NM_PER_MM_WA: Final = float(np.log10(1.0e6 / WOOD_ANDERSON_MAGNIFICATION))


@dataclass(frozen=True, slots=True, eq=False)
class DistanceCorrection:
    """A distance correction for ML: C(R) with ML = log10(A_nm) + C(R).

    Attributes
    ----------
    name : str
        Short tag written into the ``formula`` column (``"ML IASPEI-2013 <name>"``).
    function : callable
        Maps hypocentral distance R (km, ndarray) to the curve value (ndarray).
    basis : {"nm", "mm_wa"}
        ``"nm"``: ``function`` is C(R) itself (IASPEI form). ``"mm_wa"``: ``function`` is
        Richter's -log A0(R) for A in mm on a Wood-Anderson record of magnification 2080.
    r_min_km, r_max_km : float
        Validity domain in hypocentral km. ``r_min_open`` makes the lower end exclusive.
    computable_outside : bool
        False for tables (no extrapolation): outside the domain the value cannot be computed.
    reference : str
        Source of the curve and of its range, with status.
    """

    name: str
    function: Callable[[NDArray[np.float64]], NDArray[np.float64]]
    basis: Literal["nm", "mm_wa"]
    r_min_km: float
    r_max_km: float
    reference: str
    r_min_open: bool = False
    computable_outside: bool = True

    def correction(self, r_km: ArrayLike) -> NDArray[np.float64]:
        """C(R) in the nm convention (ML = log10(A_nm) + C(R)); NaN where R <= 0."""
        r = np.asarray(r_km, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            value = self.function(np.where(r > 0.0, r, np.nan))
        return value - _LOG_NM_PER_MM_WA if self.basis == "mm_wa" else value

    def minus_log_a0(self, r_km: ArrayLike) -> NDArray[np.float64]:
        """Richter's -log A0(R) for A in mm on a Wood-Anderson record of magnification 2080."""
        return self.correction(r_km) + _LOG_NM_PER_MM_WA

    @classmethod
    def from_table(
        cls,
        name: str,
        distance_km: ArrayLike,
        minus_log_a0: ArrayLike,
        *,
        reference: str,
    ) -> DistanceCorrection:
        """A tabulated -log A0 curve (mm on Wood-Anderson 2080), linear in R between points.

        Parameters
        ----------
        name : str
            Tag for the ``formula`` column; must not contain spaces.
        distance_km : array_like of float, shape (n,)
            Hypocentral distances, km, strictly increasing, n >= 2, all > 0.
        minus_log_a0 : array_like of float, shape (n,)
            -log A0 at those distances (finite).
        reference : str
            Where the table comes from.

        Raises
        ------
        ValueError
            If the table is not as described.
        """
        d = np.asarray(distance_km, dtype=np.float64)
        v = np.asarray(minus_log_a0, dtype=np.float64)
        if not name or any(c.isspace() for c in name):
            raise ValueError(f"distance-correction name {name!r} must be one word")
        if d.ndim != 1 or d.shape != v.shape or d.size < 2:
            raise ValueError("a -log A0 table needs two columns of equal length, >= 2 rows")
        if not (np.all(np.isfinite(d)) and np.all(np.isfinite(v))):
            raise ValueError("a -log A0 table must hold finite numbers only")
        if d[0] <= 0.0 or np.any(np.diff(d) <= 0.0):
            raise ValueError("table distances must be > 0 km and strictly increasing")

        def interpolate(r: NDArray[np.float64]) -> NDArray[np.float64]:
            out = np.array(np.interp(r, d, v), dtype=np.float64)
            out[(r < d[0]) | (r > d[-1]) | np.isnan(r)] = np.nan
            return out

        return cls(
            name=name,
            function=interpolate,
            basis="mm_wa",
            r_min_km=float(d[0]),
            r_max_km=float(d[-1]),
            reference=reference,
            computable_outside=False,
        )


def _hb87_iaspei(r: NDArray[np.float64]) -> NDArray[np.float64]:
    return 1.11 * np.log10(r) + 0.00189 * r - 2.09


def _hb87_mm(r: NDArray[np.float64]) -> NDArray[np.float64]:
    return 1.110 * np.log10(r / 100.0) + 0.00189 * (r - 100.0) + 3.0


def _bj84_mm(r: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.log10(r / 100.0) + 0.00301 * (r - 100.0) + 3.0


HB87: Final = DistanceCorrection(
    name="HB87",
    function=_hb87_iaspei,
    basis="nm",
    r_min_km=0.0,
    r_max_km=1000.0,
    r_min_open=True,
    reference=(
        "IASPEI standard ML (Hutton & Boore 1987 curve in the nm form); 'R typically less than "
        "1000 km' (IASPEI standard procedures, verified)"
    ),
)
HB87_MM: Final = DistanceCorrection(
    name="HB87-mm",
    function=_hb87_mm,
    basis="mm_wa",
    r_min_km=10.0,
    r_max_km=700.0,
    reference=(
        "Hutton & Boore (1987) BSSA 77(6), -log A0 anchored at 3.0 for 100 km; calibration "
        "range about 10-700 km (abstract, verified)"
    ),
)
BJ84: Final = DistanceCorrection(
    name="BJ84",
    function=_bj84_mm,
    basis="mm_wa",
    r_min_km=0.0,
    r_max_km=400.0,
    r_min_open=True,
    reference=(
        "Bakun & Joyner (1984) BSSA 74(5) eq. 3 (as in obspy.signal.invsim.estimate_magnitude, "
        "verified); range 0 < R <= 400 km from memory"
    ),
)

#: Built-in distance corrections by name.
DISTANCE_CORRECTIONS: Final[dict[str, DistanceCorrection]] = {
    c.name: c for c in (HB87, HB87_MM, BJ84)
}


def read_distance_correction_csv(path: Path, *, name: str | None = None) -> DistanceCorrection:
    """Read a user -log A0 table: CSV with header ``distance_km,minus_log_a0``.

    Lines starting with ``#`` are comments (put the table's source there). Distances are
    hypocentral, km, strictly increasing; -log A0 is for A in mm on a Wood-Anderson record of
    static magnification 2080 (Richter's convention, as Hutton & Boore 1987 and Bakun & Joyner
    1984). Values between rows are interpolated linearly in R; outside the first and last row
    ML is not computed.

    Parameters
    ----------
    path : Path
        The CSV file.
    name : str, optional
        Tag for the ``formula`` column; default ``"table:<file stem>"``.

    Returns
    -------
    DistanceCorrection

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    MalformedFileError
        If the header, a number or the ordering is wrong; the message names file and line.

    Examples
    --------
    A table file reads like this::

        # -log A0 of my region, from <paper, table, page>
        distance_km,minus_log_a0
        10,1.72
        100,3.00
        300,3.91
    """
    path = Path(path)
    tag = name if name is not None else f"table:{path.stem}"
    with path.open(newline="", encoding="utf-8") as handle:
        rows = [
            (number, row)
            for number, row in enumerate(csv.reader(handle), start=1)
            if row and not row[0].lstrip().startswith("#")
        ]
    if not rows or [c.strip() for c in rows[0][1]] != ["distance_km", "minus_log_a0"]:
        where = f"line {rows[0][0]}" if rows else "line 1"
        raise MalformedFileError(
            f"{path}: {where}: the header must be 'distance_km,minus_log_a0'; fix the header"
        )
    distances: list[float] = []
    values: list[float] = []
    for number, row in rows[1:]:
        try:
            if len(row) != 2:
                raise ValueError
            d, v = float(row[0]), float(row[1])
        except ValueError:
            raise MalformedFileError(
                f"{path}: line {number}: expected two numbers 'distance_km,minus_log_a0', "
                f"got {','.join(row)!r}; fix the row"
            ) from None
        if (
            not (np.isfinite(d) and np.isfinite(v))
            or d <= 0.0
            or (distances and d <= distances[-1])
        ):
            raise MalformedFileError(
                f"{path}: line {number}: distance {row[0].strip()} km must be finite, > 0 and "
                "greater than the row above; sort the table by distance"
            )
        distances.append(d)
        values.append(v)
    if len(distances) < 2:
        raise MalformedFileError(f"{path}: the table needs at least two rows; add rows")
    return DistanceCorrection.from_table(tag, distances, values, reference=str(path))


def evaluate_ml(
    amplitude: ArrayLike,
    hypocentral_distance_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    correction: DistanceCorrection = HB87,
) -> Evaluation:
    """Evaluate ML with per-input domain reasons (see :func:`ml`; no policy applied)."""
    a_nm = convert_amplitude(amplitude, unit, formula="ML", accepted=WOOD_ANDERSON_UNITS)
    a_nm, r = broadcast_float(a_nm, hypocentral_distance_km)
    reasons = ReasonBuilder(a_nm.shape)
    require_positive(reasons, a_nm, "amplitude", "nm")
    require_positive(reasons, r, "hypocentral distance", "km")
    require_range(
        reasons,
        r,
        correction.r_min_km,
        correction.r_max_km,
        what="hypocentral distance",
        unit="km",
        source=correction.reference,
        computable=correction.computable_outside,
        low_open=correction.r_min_open,
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.log10(a_nm) + correction.correction(r)
    return finish(f"ML IASPEI-2013 {correction.name}", value, reasons)


def ml(
    amplitude: ArrayLike,
    hypocentral_distance_km: ArrayLike,
    *,
    unit: str | AmplitudeUnit = AmplitudeUnit.nm,
    correction: DistanceCorrection = HB87,
    policy: DomainPolicy = "raise",
) -> NDArray[np.float64]:
    """Local magnitude ML = log10(A) + C(R) (IASPEI standard form), vectorized.

    Parameters
    ----------
    amplitude : array_like of float
        Maximum trace amplitude of one horizontal component. In nm of Wood-Anderson-simulated
        displacement with static magnification 1 (``unit="nm"`` or ``"um"``), or in mm read
        on a Wood-Anderson record of magnification 2080 (``unit="mm_wa"``).
    hypocentral_distance_km : array_like of float
        Hypocentral distance R, km; broadcast against ``amplitude``.
    unit : {"nm", "um", "mm_wa"}, default="nm"
        Unit of ``amplitude``; a velocity unit raises :class:`~stations.errors.UnitError`.
    correction : DistanceCorrection, default=HB87
        C(R): :data:`HB87` (IASPEI standard), :data:`HB87_MM`, :data:`BJ84` or a table from
        :func:`read_distance_correction_csv`.
    policy : {"raise", "nan", "compute"}, default="raise"
        What to do with inputs outside the correction's distance range
        (:mod:`stations.formulas.domain`).

    Returns
    -------
    ndarray of float64
        ML, broadcast shape of the inputs (0-d for scalars).

    Raises
    ------
    UnitError
        If ``unit`` is not a Wood-Anderson displacement unit.
    DomainError
        With ``policy="raise"``, for inputs out of domain or not computable (amplitude or
        distance missing or <= 0; outside a table).

    Warns
    -----
    OutOfDomainWarning
        With ``policy="nan"`` or ``"compute"``, see :mod:`stations.formulas.domain`.

    See Also
    --------
    stations.formulas.compute_station_magnitudes : the batch entry point on record frames.

    Notes
    -----
    Equation and ranges in the module docstring. Station corrections (the D term of IASPEI's
    regional form) are not applied here; learning them is the job of :mod:`fusion`.

    References
    ----------
    IASPEI (2013), standard procedures for magnitude determination, ML. Hutton & Boore (1987),
    BSSA 77(6), 2074-2094.

    Examples
    --------
    1 mm on a Wood-Anderson record at 100 km (Richter's ML 3 anchor):

    >>> round(float(ml(1.0, 100.0, unit="mm_wa")), 4)
    3.0009
    >>> round(float(ml(1.0, 100.0, unit="mm_wa", correction=HB87_MM)), 4)
    3.0
    """
    return evaluate_ml(
        amplitude, hypocentral_distance_km, unit=unit, correction=correction
    ).resolve(policy)
